"""File-system helpers every layer may use: bounded reads, and replacing a whole output folder in one step.

`replace_tree` builds the new folder next to the old one (a sibling whose name starts with a dot), then swaps the
two with one rename, so a reader or an interrupted run sees the old folder or the new one, never a mixture.
`staged_tree` does the same for a caller that writes the new version file by file (while it computes the rest).
Files are created exclusively and never through symbolic links; nothing is written outside the folder and its
staging sibling. A staging sibling left by a killed run is recognised (nobody holds its lock) and removed on the
next run, after moving back any version-control entries it was carrying.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import stat
import tempfile
import time
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

from ivdossier.errors import InvalidInputError

try:  # POSIX advisory locks tell a live staging folder from one left by a killed process.
    import fcntl
except ImportError:  # pragma: no cover - Windows
    fcntl = None  # type: ignore[assignment]

# Entries a team may keep inside an output folder (version control); carried over into each new version.
PRESERVED = frozenset({".git", ".gitignore", ".gitattributes", ".hg", ".hgignore"})
# Desktop clutter that may appear in any folder; dropped, never carried over.
CLUTTER = frozenset({".DS_Store", "Thumbs.db", "desktop.ini"})
STAGING_TAG = ".ivdossier-staging-"
OLD_TAG = ".ivdossier-old-"
STALE_AFTER_S = 3600.0  # without POSIX locks, a staging folder this old is considered abandoned
_O_NOFOLLOW = getattr(os, "O_NOFOLLOW", 0)
_O_CLOEXEC = getattr(os, "O_CLOEXEC", 0)
_O_BINARY = getattr(os, "O_BINARY", 0)


# ---------------------------------------------------------------- bounded reads


def read_bounded_bytes(path: str | Path, limit: int, *, what: str) -> bytes:
    """The bytes of a regular file, refusing anything larger than `limit` (or endless, like /dev/zero).

    Reads at most limit + 1 bytes, so the size is known without trusting what stat reports.
    """
    where = str(path)
    try:
        fd = os.open(where, os.O_RDONLY | _O_CLOEXEC | _O_BINARY)
    except OSError as exc:
        raise InvalidInputError(
            f"cannot read {where!r} for {what}: {exc.strerror or exc}; check the path."
        ) from exc
    try:
        info = os.fstat(fd)
        if stat.S_ISDIR(info.st_mode):
            raise InvalidInputError(f"{where!r} is a folder, not a file; pass a file for {what}.")
        chunks: list[bytes] = []
        size = 0
        while size <= limit:
            chunk = os.read(fd, min(1 << 20, limit + 1 - size))
            if not chunk:
                break
            chunks.append(chunk)
            size += len(chunk)
    except OSError as exc:
        raise InvalidInputError(f"cannot read {where!r} for {what}: {exc.strerror or exc}.") from exc
    finally:
        os.close(fd)
    if size > limit:
        raise InvalidInputError(
            f"{where!r} is larger than {limit:,} bytes, the limit for {what}; split it or shorten it."
        )
    return b"".join(chunks)


def read_bounded_text(path: str | Path, limit: int, *, what: str) -> str:
    """UTF-8 text of a file of at most `limit` bytes (see read_bounded_bytes), or one clear error."""
    data = read_bounded_bytes(path, limit, what=what)
    try:
        return data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise InvalidInputError(
            f"{str(path)!r} is not UTF-8 text (byte {exc.start}); save it as UTF-8 and try again."
        ) from exc


# ---------------------------------------------------------------- scanning without following links


@dataclass(frozen=True)
class Entry:
    """One entry of a folder tree as found on disk: path relative to the root and what it is."""

    rel: str
    kind: str  # "file", "dir", "link" or "other" (fifo, socket, device)


def scan_tree(root: Path) -> list[Entry]:
    """Every entry under root (dot-entries included), never following a link; preserved entries not entered."""
    out: list[Entry] = []

    def walk(folder: Path, prefix: str) -> None:
        with os.scandir(folder) as it:
            for item in sorted(it, key=lambda e: e.name):
                rel = prefix + item.name
                if item.is_symlink():
                    out.append(Entry(rel, "link"))
                elif item.is_dir(follow_symlinks=False):
                    out.append(Entry(rel, "dir"))
                    if not (prefix == "" and item.name in PRESERVED):
                        walk(Path(item.path), rel + "/")
                elif item.is_file(follow_symlinks=False):
                    out.append(Entry(rel, "file"))
                else:
                    out.append(Entry(rel, "other"))

    walk(root, "")
    return out


def read_regular(path: Path, limit: int | None = None) -> bytes | None:
    """A regular file's bytes read without following a link; None for a link, a folder or anything else."""
    try:
        fd = os.open(path, os.O_RDONLY | _O_NOFOLLOW | _O_CLOEXEC | _O_BINARY)
    except OSError:
        return None
    try:
        if not stat.S_ISREG(os.fstat(fd).st_mode):
            return None
        with os.fdopen(os.dup(fd), "rb") as fh:
            return fh.read() if limit is None else fh.read(limit)
    finally:
        os.close(fd)


# ---------------------------------------------------------------- replacing a folder in one step


@dataclass(frozen=True)
class TreeChange:
    """How the new folder differs from the one it replaced: files written (new or changed), unchanged, removed."""

    written: int
    unchanged: int
    removed: int


def _check_rel(rel: str) -> list[str]:
    parts = rel.split("/")
    if rel.startswith("/") or any(p in ("", ".", "..") or "\\" in p or "\x00" in p for p in parts):
        raise InvalidInputError(
            f"refusing to write {rel!r}: it is not a plain relative path inside the folder."
        )
    return parts


def _create_file(folder_fd: int, name: str, data: bytes) -> None:
    flags = os.O_WRONLY | os.O_CREAT | os.O_EXCL | _O_NOFOLLOW | _O_CLOEXEC | _O_BINARY
    fd = os.open(name, flags, 0o666, dir_fd=folder_fd)
    try:
        view = memoryview(data)
        while view:
            view = view[os.write(fd, view) :]
    finally:
        os.close(fd)


_RENAME_EXCHANGE = 2
_AT_FDCWD = -100


def _exchange(a: Path, b: Path) -> bool:
    """Atomically swap two paths (Linux renameat2 RENAME_EXCHANGE); False where the system cannot."""
    if not hasattr(os, "uname") or os.uname().sysname != "Linux":
        return False
    import ctypes  # only folder swaps need it (kept out of every command's start-up)
    import ctypes.util

    try:
        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True)
        renameat2 = libc.renameat2
    except (OSError, AttributeError):
        return False
    renameat2.argtypes = [ctypes.c_int, ctypes.c_char_p, ctypes.c_int, ctypes.c_char_p, ctypes.c_uint]
    renameat2.restype = ctypes.c_int
    result = renameat2(_AT_FDCWD, os.fsencode(a), _AT_FDCWD, os.fsencode(b), _RENAME_EXCHANGE)
    if result == 0:
        return True
    err = ctypes.get_errno()
    if err in (22, 38, 95):  # EINVAL, ENOSYS, EOPNOTSUPP: this file system cannot exchange
        return False
    raise OSError(err, os.strerror(err), str(b))


def _prefix(target: Path) -> str:
    return "." + target.name[:180]


@contextlib.contextmanager
def _locked(folder: Path) -> Iterator[bool]:
    """Hold an exclusive, non-blocking lock on a folder; yields False if another live process holds it."""
    if fcntl is None:  # pragma: no cover - Windows: fall back to the folder's age
        try:
            yield time.time() - folder.stat().st_mtime > STALE_AFTER_S
        except OSError:
            yield False
        return
    try:
        fd = os.open(folder, os.O_RDONLY | _O_NOFOLLOW | _O_CLOEXEC)
    except OSError:
        yield False
        return
    try:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            yield False
            return
        yield True
    finally:
        os.close(fd)


def clean_stale(target: Path) -> None:
    """Finish or undo what a killed run left beside `target`: bring back a moved-away folder, return carried
    version-control entries, delete abandoned staging folders."""
    parent = target.parent
    if not parent.is_dir():
        return
    prefix = _prefix(target)
    stale = sorted(
        p
        for p in parent.iterdir()
        if p.name.startswith(prefix + STAGING_TAG) or p.name.startswith(prefix + OLD_TAG)
    )
    for path in stale:
        if path.is_symlink() or not path.is_dir():
            path.unlink(missing_ok=True)
            continue
        with _locked(path) as abandoned:
            if not abandoned:
                continue
            if OLD_TAG in path.name and not os.path.lexists(target):
                os.rename(path, target)  # the previous folder was moved aside and never replaced
                continue
            if target.is_dir() and not target.is_symlink():
                for name in PRESERVED:
                    carried = path / name
                    if os.path.lexists(carried) and not os.path.lexists(target / name):
                        os.rename(carried, target / name)
            shutil.rmtree(path, ignore_errors=True)


def replace_tree(
    target: str | Path,
    files: Mapping[str, bytes],
    *,
    allowed_old: Sequence[str] | None = None,
    compare: bool = True,
) -> TreeChange:
    """Make `target` hold exactly `files` (relative path -> bytes) plus its version-control entries, in one swap.

    The caller has checked the old folder's entries; `allowed_old` (relative paths) are those it accepted as
    replaceable. Returns how many files changed compared with the old folder (`compare=False` reads no old file
    and counts every file as written).
    """
    with staged_tree(target, allowed_old=allowed_old, compare=compare) as stage:
        for rel in sorted(files):
            stage.write(rel, files[rel])
        return stage.commit()


@contextlib.contextmanager
def staged_tree(
    target: str | Path, *, allowed_old: Sequence[str] | None = None, compare: bool = True
) -> Iterator[StagedTree]:
    """A new version of `target` written file by file beside it (`StagedTree.write`) and swapped in by
    `StagedTree.commit`; leaving the block any other way (an error, or no commit) removes it, and `target` stays
    as it was. `allowed_old` and `compare` as for `replace_tree`."""
    stage = StagedTree(Path(target), allowed_old, compare)
    try:
        yield stage
    finally:
        stage.close()


class StagedTree:
    """The staging sibling of a folder being replaced, locked while this process writes it (see `staged_tree`)."""

    def __init__(self, root: Path, allowed_old: Sequence[str] | None, compare: bool) -> None:
        self.root = root
        parent = root.parent
        parent.mkdir(parents=True, exist_ok=True)
        clean_stale(root)
        self.existed = root.is_dir()
        old_files = {e.rel for e in scan_tree(root) if e.kind == "file"} if self.existed else set()
        old_files = {
            r for r in old_files if r.split("/")[0] not in PRESERVED and r.split("/")[-1] not in CLUTTER
        }
        if allowed_old is not None:
            old_files &= set(allowed_old)
        self.old_files = old_files
        self.compare = compare
        self.unchanged: set[str] = set()
        self.files: set[str] = set()
        self.folders: set[str] = set()
        self.done = False
        self.staging = Path(tempfile.mkdtemp(prefix=_prefix(root) + STAGING_TAG, dir=parent))
        self.lock_fd = os.open(self.staging, os.O_RDONLY | _O_CLOEXEC)
        try:
            if fcntl is not None:
                fcntl.flock(self.lock_fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BaseException:
            self.close()
            raise

    def write(self, rel: str, data: bytes) -> None:
        """Write one file of the new version (created exclusively, no link followed); writing the same path again
        replaces what this stage wrote there."""
        if self.done:
            raise RuntimeError("the staged folder has been committed or removed; nothing more can be written")
        parts = _check_rel(rel)
        for depth in range(1, len(parts)):
            sub = "/".join(parts[:depth])
            if sub not in self.folders:
                os.mkdir(self.staging / sub, 0o777)
                self.folders.add(sub)
        dir_fd = os.open(
            self.staging.joinpath(*parts[:-1]),
            os.O_RDONLY | _O_NOFOLLOW | _O_CLOEXEC | getattr(os, "O_DIRECTORY", 0),
        )
        try:
            if rel in self.files:
                os.unlink(parts[-1], dir_fd=dir_fd)
                self.unchanged.discard(rel)
            _create_file(dir_fd, parts[-1], data)
        finally:
            os.close(dir_fd)
        self.files.add(rel)
        if self.compare and rel in self.old_files and read_regular(self.root / rel) == data:
            self.unchanged.add(rel)

    def commit(self) -> TreeChange:
        """Swap the new version in (one rename where the system can exchange two paths) and return how it
        differs from the old one."""
        if self.done:
            raise RuntimeError("the staged folder has been committed or removed already")
        root, staging = self.root, self.staging
        change = TreeChange(
            written=len(self.files) - len(self.unchanged),
            unchanged=len(self.unchanged),
            removed=len(self.old_files - self.files),
        )
        try:
            mode = stat.S_IMODE(root.stat().st_mode) if self.existed else 0o777 & ~_umask()
            os.chmod(staging, mode)
            if not self.existed:
                os.rename(staging, root)  # also replaces an empty folder created meanwhile
                self.done = True
                return change
            for name in sorted(PRESERVED):
                if os.path.lexists(root / name):
                    os.rename(root / name, staging / name)
            if _exchange(staging, root):
                self.done = True
                shutil.rmtree(staging, ignore_errors=True)  # now holds the old folder
                return change
            old = Path(tempfile.mkdtemp(prefix=_prefix(root) + OLD_TAG, dir=root.parent))
            os.rmdir(old)
            os.rename(root, old)
            os.rename(staging, root)
            self.done = True
            shutil.rmtree(old, ignore_errors=True)
            return change
        except BaseException:
            if os.path.isdir(staging) and os.path.isdir(root):
                for name in sorted(PRESERVED):
                    if os.path.lexists(staging / name) and not os.path.lexists(root / name):
                        os.rename(staging / name, root / name)
            raise

    def close(self) -> None:
        """Remove the staging folder unless it was committed, and release its lock."""
        if self.lock_fd < 0:
            return
        try:
            if not self.done:
                self.done = True
                staging = self.staging
                if staging.name.startswith(_prefix(self.root) + STAGING_TAG) and os.path.isdir(staging):
                    shutil.rmtree(staging, ignore_errors=True)
        finally:
            os.close(self.lock_fd)
            self.lock_fd = -1


def _read_umask() -> int:
    mask = os.umask(0o022)
    os.umask(mask)
    return mask


_UMASK = _read_umask()  # read once at import: changing the umask later would race with other threads


def _umask() -> int:
    return _UMASK
