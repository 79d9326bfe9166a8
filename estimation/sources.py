"""Data sources on disk for the estimation engines: which files, how big, their fingerprint and whether pandas fits.

A source is one .parquet or .csv file, or a directory of .parquet files (read as one table). The fingerprint of
a file is the SHA-256 of its bytes; of a directory, the SHA-256 over one line per file (relative name, size and
the file's own SHA-256), sorted by name, so renaming, resizing or editing any file changes it.
"""

from __future__ import annotations

import hashlib
import os
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.data import file_sha256

# pandas holds the used columns as float64 and, while partialling, about three more copies of the model
# columns (the read table, the numeric arrays, the partialled arrays): bytes needed ~ rows x columns x 8 x this
PANDAS_COPIES = 4.0
# engine="auto" uses pandas up to this estimate of in-memory bytes, DuckDB above it
AUTO_PANDAS_MAX_BYTES = 2 * 1024**3
# the pandas engine is refused when its estimate exceeds this share of the memory available now
PANDAS_MEMORY_SHARE = 0.8
CSV_SAMPLE_BYTES = 1 << 20


@dataclass(frozen=True)
class Source:
    """The files of one data source, their format and total size."""

    path: Path
    files: tuple[Path, ...]
    format: str  # "parquet" or "csv"
    bytes: int

    @property
    def is_directory(self) -> bool:
        """True when the source is a directory of Parquet files."""
        return self.path.is_dir()


def resolve_source(path: str | os.PathLike[str]) -> Source:
    """The files behind ``path`` (a .parquet/.csv file or a directory of .parquet files); one clear error else."""
    p = Path(path)
    if p.is_dir():
        files = tuple(sorted(f for f in p.rglob("*.parquet") if f.is_file()))
        if not files:
            raise InvalidInputError(
                f"The directory {str(p)!r} holds no .parquet files; point to a file or a directory of Parquet files."
            )
        return Source(p, files, "parquet", sum(f.stat().st_size for f in files))
    if not p.is_file():
        raise InvalidInputError(f"Cannot read {str(p)!r}: no such file or directory; check the path.")
    suffix = p.suffix.lower()
    if suffix not in (".parquet", ".csv"):
        raise InvalidInputError(
            f"The engines read .parquet and .csv files (or a directory of .parquet files), not {suffix or '(none)'!r}; "
            "convert the file or use ivdossier.estimation.load_table with estimate()."
        )
    return Source(p, (p,), suffix[1:], p.stat().st_size)


def fingerprint(source: Source) -> str:
    """SHA-256 of the file, or over the names, sizes and SHA-256 of each file of a directory (sorted by name)."""
    if not source.is_directory:
        return file_sha256(source.files[0])
    h = hashlib.sha256()
    for f in source.files:
        rel = f.relative_to(source.path).as_posix()
        h.update(f"{rel}\t{f.stat().st_size}\t{file_sha256(f)}\n".encode())
    return h.hexdigest()


def parquet_rows_and_types(source: Source) -> tuple[int, dict[str, str]]:
    """Row count (from the file footers, no data read) and the Arrow type of each column."""
    import pyarrow.parquet as pq

    rows = 0
    types: dict[str, str] = {}
    for f in source.files:
        meta = pq.ParquetFile(f)
        rows += meta.metadata.num_rows
        if not types:
            types = {field.name: str(field.type) for field in meta.schema_arrow}
    return rows, types


def csv_rows_estimate(source: Source) -> int:
    """Rows of a CSV file estimated from the mean length of the lines in its first megabyte."""
    with source.files[0].open("rb") as fh:
        head = fh.read(CSV_SAMPLE_BYTES)
    lines = head.count(b"\n")
    if lines <= 1:
        return 1
    per_line = len(head) / lines
    return max(int(source.bytes / per_line) - 1, 1)


def available_memory() -> int:
    """Bytes of memory available now (MemAvailable on Linux, else physical pages free)."""
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        pass
    try:
        return int(os.sysconf("SC_AVPHYS_PAGES")) * int(os.sysconf("SC_PAGE_SIZE"))
    except (ValueError, OSError, AttributeError):
        return 0


@dataclass(frozen=True)
class MemoryEstimate:
    """What the pandas engine would hold for a model over this source."""

    rows: int
    columns: int
    bytes_needed: int
    bytes_available: int
    rows_estimated: bool

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe form."""
        return {
            "rows": self.rows,
            "rows_estimated_from_size": self.rows_estimated,
            "columns": self.columns,
            "bytes_needed": self.bytes_needed,
            "bytes_available": self.bytes_available,
        }


def gib(n: float) -> str:
    """Bytes in GiB with two decimals."""
    return f"{n / 1024**3:.2f} GiB"


def pandas_memory(source: Source, used_columns: Sequence[str]) -> MemoryEstimate:
    """Estimate the memory the pandas engine needs: rows x used columns x 8 bytes x PANDAS_COPIES."""
    if source.format == "parquet":
        rows, _ = parquet_rows_and_types(source)
        estimated = False
    else:
        rows, estimated = csv_rows_estimate(source), True
    cols = len(dict.fromkeys(used_columns))
    need = int(rows * cols * 8 * PANDAS_COPIES)
    return MemoryEstimate(rows, cols, need, available_memory(), estimated)


def check_pandas_fits(est: MemoryEstimate) -> None:
    """Refuse the pandas engine (one clear error) when its estimate exceeds the memory available."""
    if est.bytes_available and est.bytes_needed > PANDAS_MEMORY_SHARE * est.bytes_available:
        rows = f"about {est.rows:,}" if est.rows_estimated else f"{est.rows:,}"
        raise InvalidInputError(
            f"engine='pandas' would need about {gib(est.bytes_needed)} of memory for {rows} rows x "
            f"{est.columns} columns, but only {gib(est.bytes_available)} are available; use engine='duckdb' "
            "(bounded memory, spills to disk) or engine='spark'."
        )
