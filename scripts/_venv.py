"""Create ./.venv with the project installed (editable, with test tools); shared by the two entry scripts."""

from __future__ import annotations

import os
import subprocess
import sys
import venv
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
VENV = ROOT / ".venv"
BIN = VENV / ("Scripts" if os.name == "nt" else "bin")


def ensure_venv() -> Path:
    """Create the virtual environment if needed and (re)install the project into it; return its bin folder."""
    if not (BIN / "python").exists() and not (BIN / "python.exe").exists():
        print(f"creating {VENV}", flush=True)
        venv.EnvBuilder(with_pip=True).create(VENV)
    pip = [str(BIN / "python"), "-m", "pip", "install", "--quiet", "--disable-pip-version-check"]
    subprocess.run([*pip, "-e", f"{ROOT}[dev]"], check=True, cwd=ROOT)
    return BIN


def run(cmd: list[str]) -> int:
    print("$ " + " ".join(cmd), flush=True)
    return subprocess.run(cmd, cwd=ROOT).returncode


if __name__ == "__main__":
    sys.exit("use scripts/run_demo.py or scripts/run_tests.py")
