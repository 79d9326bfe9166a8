"""Write a document file, or a Markdown document together with the folder of SVG figures it links to.

Neither is ever seen half-written. A single file is written to a temporary sibling and renamed over the old one.
A Markdown document and its figure folder cannot be swapped in one rename, so they are replaced in three steps,
each of them atomic, such that every image link of whichever document is on disk resolves at every moment:

1. the folder is replaced (staged and swapped, `ivdossier.safefiles.replace_tree`) by the new figures plus any
   old figure the old document still links to;
2. the document is replaced by the new one (temporary sibling, one rename);
3. when old figures were kept in step 1, the folder is replaced once more by exactly the new figures.

The figure folder is ours: it may hold only SVG files (and desktop clutter), and anything else in it is refused
before a byte is written.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Mapping
from pathlib import Path

from ivdossier import safefiles
from ivdossier.errors import InvalidInputError


def write_file(path: Path, data: bytes) -> Path:
    """Replace `path` by `data` in one rename (the old file, or none, until the new one is complete)."""
    path = Path(path)
    if path.is_symlink() or (path.exists() and not path.is_file()):
        raise InvalidInputError(f"{str(path)!r} is not a regular file; choose another output path.")
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name[:100]}.", suffix=".tmp", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.chmod(tmp, 0o666 & ~safefiles._umask())  # mkstemp creates 0600; give the usual file mode
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path


def _old_figures(folder: Path) -> dict[str, bytes]:
    """The SVG files of an earlier build of `folder`; a folder holding anything else is refused."""
    if not os.path.lexists(folder):
        return {}
    if folder.is_symlink() or not folder.is_dir():
        raise InvalidInputError(
            f"{str(folder)!r} should be the dossier's figure folder but is not a folder; move it away."
        )
    found: dict[str, bytes] = {}
    strays = []
    for entry in safefiles.scan_tree(folder):
        name = entry.rel.rsplit("/", 1)[-1]
        if name in safefiles.CLUTTER:
            continue
        if entry.kind != "file" or "/" in entry.rel or not name.endswith(".svg"):
            strays.append(entry.rel + (" (a symbolic link)" if entry.kind == "link" else ""))
            continue
        data = safefiles.read_regular(folder / entry.rel)
        if data is not None:
            found[entry.rel] = data
    if strays:
        raise InvalidInputError(
            f"the figure folder {str(folder)!r} holds files that are not dossier figures "
            f"({', '.join(sorted(strays)[:5])}); move them away or choose another output name."
        )
    return found


def write_document(path: Path, text: str, folder: Path, figures: Mapping[str, bytes]) -> list[Path]:
    """Write the Markdown `text` to `path` and exactly `figures` (file name -> SVG bytes) into `folder`.

    Returns the written paths, document first. With no figures the folder is removed (after the document).
    """
    path, folder = Path(path), Path(folder)
    for name in figures:
        if "/" in name or "\\" in name or not name.endswith(".svg") or name.startswith("."):
            raise InvalidInputError(f"figure file name {name!r} must be a plain name ending in .svg.")
    safefiles.clean_stale(folder)
    old = _old_figures(folder)
    keep = {name: data for name, data in old.items() if name not in figures}
    if figures:
        safefiles.replace_tree(folder, {**figures, **keep}, allowed_old=list(old))
    write_file(path, text.encode("utf-8"))
    if figures and keep:
        safefiles.replace_tree(folder, dict(figures), allowed_old=list(old) + list(figures))
    elif not figures and old:
        for name in old:  # the document on disk no longer links to any of them
            (folder / name).unlink(missing_ok=True)
        with contextlib.suppress(OSError):  # a folder still holding version-control entries stays
            folder.rmdir()
    return [path, *(folder / name for name in sorted(figures))]
