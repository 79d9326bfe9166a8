"""Create ./.venv with the project installed (editable, with test tools); shared by the two entry scripts.

The install is editable, so code changes need no reinstall; pip runs again only when pyproject.toml (the
dependencies or the package layout) changed since the last install, recorded in a stamp file inside the venv.
"""

from __future__ import annotations

import hashlib
import os
import subprocess
import sys
import venv
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
VENV = ROOT / ".venv"
BIN = VENV / ("Scripts" if os.name == "nt" else "bin")
STAMP = VENV / "ivdossier-install.sha256"


def _install_fingerprint() -> str:
    """What the install depends on: pyproject.toml's bytes and the interpreter's version."""
    digest = hashlib.sha256((ROOT / "pyproject.toml").read_bytes())
    digest.update(sys.version.encode())
    return digest.hexdigest()


def ensure_venv() -> Path:
    """Create the virtual environment if needed and install the project when pyproject.toml changed."""
    if not (BIN / "python").exists() and not (BIN / "python.exe").exists():
        print(f"creating {VENV}", flush=True)
        venv.EnvBuilder(with_pip=True).create(VENV)
    fingerprint = _install_fingerprint()
    if STAMP.exists() and STAMP.read_text().strip() == fingerprint and (BIN / "ivdossier").exists():
        return BIN
    pip = [str(BIN / "python"), "-m", "pip", "install", "--quiet", "--disable-pip-version-check"]
    subprocess.run([*pip, "-e", f"{ROOT}[dev]"], check=True, cwd=ROOT)
    STAMP.write_text(fingerprint + "\n")
    return BIN


def run(cmd: list[str]) -> int:
    print("$ " + " ".join(cmd), flush=True)
    return subprocess.run(cmd, cwd=ROOT).returncode


if __name__ == "__main__":
    sys.exit("use scripts/run_demo.py or scripts/run_tests.py")
