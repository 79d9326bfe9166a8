"""Write the static site of a registry with a fixed timestamp and print the SHA-256 of every file, so that a speed
change can be shown to leave the site byte for byte the same.

Run: .venv/bin/python benchmarks/site_manifest.py --db REGISTRY OUT_FOLDER [--manifest FILE]

Compare two manifests (before and after a change) with `cmp` or `diff`. The last line is a hash over all lines.
A scale registry to try it on: `python -c "import sys; sys.path.insert(0, 'benchmarks');
from bench_registry_scale import load; load('s.sqlite', instruments=1000, threats=500, links_per_instrument=20)"`.
"""

from __future__ import annotations

import argparse
import hashlib
import time
from pathlib import Path

STAMP = "2026-01-01T00:00:00+00:00"


def manifest(folder: Path) -> list[str]:
    """'<sha256>  <relative path>' for every file under `folder`, sorted by path."""
    return [
        f"{hashlib.sha256(p.read_bytes()).hexdigest()}  {p.relative_to(folder).as_posix()}"
        for p in sorted(folder.rglob("*"))
        if p.is_file()
    ]


def main() -> None:
    parser = argparse.ArgumentParser(
        description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter
    )
    parser.add_argument("--db", required=True, help="Registry path or URL.")
    parser.add_argument("out", type=Path, help="Folder for the site (an earlier site there is replaced).")
    parser.add_argument("--manifest", type=Path, help="Also write the manifest to this file.")
    args = parser.parse_args()
    from ivdossier.registry.db import open_registry
    from ivdossier.workflows.dossiers import write_site

    registry = open_registry(args.db)
    start = time.perf_counter()
    try:
        with registry.reading() as session:
            pages = write_site(session, args.out, generated_at=STAMP)
    finally:
        registry.dispose()
    seconds = time.perf_counter() - start
    lines = manifest(args.out.resolve())
    total = hashlib.sha256("\n".join(lines).encode()).hexdigest()
    if args.manifest:
        args.manifest.write_text("\n".join(lines) + "\n", encoding="utf-8")
    print("\n".join(lines))
    print(f"{len(pages)} pages in {seconds:.2f} s; all files: {total}")


if __name__ == "__main__":
    main()
