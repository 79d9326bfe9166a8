"""Test helper: rewrite an export's manifest so its per-file SHA-256 list matches the folder again.

Tests that check how import judges file *content* use it after editing files by hand: it plays a forger who
also updates the manifest, so the content checks (not only the hash check) are exercised.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path


def reseal(folder: Path) -> None:
    manifest_path = folder / "manifest.json"
    manifest = json.loads(manifest_path.read_text(encoding="utf-8"))
    files = {}
    for path in sorted(folder.rglob("*")):
        rel = path.relative_to(folder).as_posix()
        if path.is_file() and not path.is_symlink() and rel != "manifest.json" and not rel.startswith("."):
            files[rel] = hashlib.sha256(path.read_bytes()).hexdigest()
    manifest["files"] = files
    manifest_path.write_text(json.dumps(manifest, indent=2, sort_keys=True) + "\n", encoding="utf-8")
