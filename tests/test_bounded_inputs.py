"""Inputs are bounded and unambiguous: repeated column names are refused with their names, and files given for
text options, BibTeX and statistics CSVs are read with a documented limit that is checked while reading."""

from __future__ import annotations

import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.data import load_table
from ivdossier.registry import records, studies
from ivdossier.safefiles import read_bounded_bytes


def _iv_csv_with_a_repeated_instrument(path: Path) -> None:
    """y and d driven by the first z; the second column also called z is noise."""
    rng = np.random.default_rng(7)
    z = rng.normal(size=400)
    d = z + rng.normal(size=400)
    y = 0.5 * d + rng.normal(size=400)
    noise = rng.normal(size=400)
    lines = ["y,d,z,z"] + [f"{a},{b},{c},{e}" for a, b, c, e in zip(y, d, z, noise, strict=True)]
    path.write_text("\n".join(lines) + "\n")


def test_a_csv_with_repeated_column_names_is_refused_naming_them(tmp_path: Path) -> None:
    path = tmp_path / "data.csv"
    path.write_text("y,d,z,z,w,w,w\n1,2,3,4,5,6,7\n")
    with pytest.raises(
        InvalidInputError, match=r"column names must be unique, but 'w' \(3 times\), 'z' \(2 times\)"
    ):
        load_table(path)


def test_a_name_that_only_looks_like_a_renamed_duplicate_is_fine(tmp_path: Path) -> None:
    path = tmp_path / "data.csv"
    path.write_text("z,z.1\n1,2\n")
    assert list(load_table(path).columns) == ["z", "z.1"]


def test_a_parquet_file_with_repeated_column_names_is_refused(tmp_path: Path) -> None:
    import pyarrow as pa
    import pyarrow.parquet as pq

    table = pa.Table.from_arrays([pa.array([1.0]), pa.array([2.0])], names=["z", "z"])
    pq.write_table(table, tmp_path / "data.parquet")
    with pytest.raises(
        InvalidInputError, match=r"(column names must be unique, but 'z' \(2 times\)|Cannot read)"
    ):
        load_table(tmp_path / "data.parquet")


def test_estimate_refuses_a_data_file_with_a_repeated_instrument_column(cli, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    _iv_csv_with_a_repeated_instrument(tmp_path / "data.csv")
    code, _, err = cli(
        "estimate",
        "--data",
        str(tmp_path / "data.csv"),
        "--outcome",
        "y",
        "--treatment",
        "d",
        "--instrument",
        "z",
    )
    assert code == 2 and "column names must be unique, but 'z' (2 times) repeat" in err


def test_an_endless_file_for_a_text_option_is_refused_quickly() -> None:
    start = time.perf_counter()
    with pytest.raises(
        InvalidInputError, match=r"'/dev/zero' is larger than 400,000 bytes, the limit for the comment"
    ):
        records.read_text_file("/dev/zero", field="comment")
    assert time.perf_counter() - start < 30  # a guard against reading forever, not a speed target


def test_a_text_option_given_as_an_endless_file_is_refused_on_the_command_line(cli) -> None:  # type: ignore[no-untyped-def]
    # the case: `@/dev/zero` used to be read whole until memory ran out
    code, _, err = cli("program", "add", "p", "--title", "P", "--question", "@/dev/zero")
    assert code == 2 and "'/dev/zero' is larger than" in err
    code, out, _ = cli("program", "list", "--json")
    assert code == 0 and '"p"' not in out  # nothing was written


def test_text_files_are_read_up_to_the_field_limit(tmp_path: Path) -> None:
    path = tmp_path / "claim.txt"
    path.write_text("é" * 10)
    assert records.read_text_file(path, field="exclusion claim", max_length=10) == "é" * 10
    path.write_text("é" * 11)
    with pytest.raises(InvalidInputError, match=r"exclusion claim is 11 characters long; the limit is 10"):
        records.read_text_file(path, field="exclusion claim", max_length=10)
    with pytest.raises(InvalidInputError, match=r"is a folder, not a file"):
        records.read_text_file(tmp_path, field="note")
    path.write_bytes(b"\xff\xfe")
    with pytest.raises(InvalidInputError, match=r"is not UTF-8 text \(byte 0\)"):
        records.read_text_file(path, field="note")


@pytest.mark.parametrize(
    ("reader", "limit", "what"),
    [
        (studies.read_bibtex_file, studies.MAX_BIBTEX_BYTES, "a BibTeX file"),
        (studies.read_stats_csv_file, studies.MAX_STATS_CSV_BYTES, "a statistics CSV file"),
    ],
)
def test_bibtex_and_statistics_files_over_their_limit_are_refused(
    tmp_path: Path, reader: object, limit: int, what: str
) -> None:
    path = tmp_path / "big"
    with path.open("wb") as fh:  # a sparse file: large on paper, no disk used
        fh.truncate(limit + 1)
    with pytest.raises(InvalidInputError, match=rf"is larger than {limit:,} bytes, the limit for {what}"):
        reader(path)  # type: ignore[operator]
    with path.open("r+b") as fh:
        fh.truncate(limit)
    assert len(reader(path)) == limit  # type: ignore[operator]


def test_bounded_reads_stop_one_byte_past_the_limit(tmp_path: Path) -> None:
    path = tmp_path / "f"
    path.write_bytes(b"abc")
    assert read_bounded_bytes(path, 3, what="x") == b"abc"
    with pytest.raises(InvalidInputError, match=r"larger than 2 bytes"):
        read_bounded_bytes(path, 2, what="x")
    with pytest.raises(InvalidInputError, match=r"cannot read .*missing.*: No such file"):
        read_bounded_bytes(tmp_path / "missing", 2, what="x")


def test_pandas_reference_agrees_when_names_are_unique(tmp_path: Path) -> None:
    path = tmp_path / "ok.csv"
    path.write_text("a,b\n1,2\n3,4\n")
    pd.testing.assert_frame_equal(load_table(path), pd.read_csv(path))  # pandas itself as the reference
