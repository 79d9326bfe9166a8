"""Bad input gives one clear error that names the column, value or option and the fix."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation import estimate, file_sha256, load_table


@pytest.fixture
def frame() -> pd.DataFrame:
    rng = np.random.default_rng(7)
    n = 200
    z = rng.normal(size=n)
    z2 = rng.normal(size=n)
    x = z + 0.5 * z2 + rng.normal(size=n)
    return pd.DataFrame(
        {
            "visits": 2 * x + rng.normal(size=n),
            "telehealth": x,
            "fibre_wave": z,
            "clerk_rate": z2,
            "age": rng.normal(size=n),
            "district": rng.integers(0, 10, n),
            "clinic": rng.integers(0, 25, n),
            "w": rng.uniform(1, 2, n),
        }
    )


def fit(frame: pd.DataFrame, **kw):
    base = dict(outcome="visits", treatment="telehealth", instruments="fibre_wave")
    base.update(kw)
    return estimate(frame, **base)


def test_missing_column_lists_close_matches(frame):
    with pytest.raises(
        InvalidInputError, match=r"Column 'fibre_wav' is not in the data; did you mean 'fibre_wave'"
    ):
        fit(frame, instruments="fibre_wav")


def test_missing_column_without_close_match(frame):
    with pytest.raises(InvalidInputError, match=r"Column 'zzz' is not in the data; check the spelling"):
        fit(frame, controls=["zzz"])


def test_non_numeric_column_names_value(frame):
    frame["age"] = frame["age"].astype(object)
    frame.loc[3, "age"] = "unknown"
    with pytest.raises(InvalidInputError, match=r"control column 'age' must be numeric.*'unknown'"):
        fit(frame, controls="age")


def test_infinite_value_names_column_and_row(frame):
    frame.loc[17, "telehealth"] = np.inf
    with pytest.raises(InvalidInputError, match=r"Column 'telehealth' holds an infinite value at row 17"):
        fit(frame)


def test_missing_values_are_dropped_and_counted(frame):
    frame.loc[[1, 2, 3], "visits"] = np.nan
    frame.loc[4, "fibre_wave"] = np.nan
    res = fit(frame)
    assert res.n == 196
    assert res.n_dropped == 4
    assert res.to_dict()["n_dropped"] == 4


def test_non_positive_weights(frame):
    frame.loc[5, "w"] = 0.0
    with pytest.raises(
        InvalidInputError, match=r"Weights column 'w' holds 1 zero or negative value\(s\), e.g. at row 5"
    ):
        fit(frame, weights="w")


def test_cluster_with_one_level(frame):
    frame["one"] = 3
    with pytest.raises(InvalidInputError, match=r"Cluster variable 'one' has a single level"):
        fit(frame, vcov="clustered", cluster="one")


def test_fewer_instruments_than_endogenous(frame):
    with pytest.raises(EstimationError, match=r"1 excluded instrument\(s\) for 2 endogenous regressor\(s\)"):
        fit(frame, treatment=["telehealth", "age"])


def test_constant_instrument(frame):
    frame["flat"] = 1.0
    with pytest.raises(EstimationError, match=r"Instrument 'flat' is constant"):
        fit(frame, instruments="flat")


def test_instrument_collinear_with_controls(frame):
    frame["z_copy"] = 2 * frame["age"] + 1
    with pytest.raises(
        EstimationError, match=r"instrument 'z_copy' is collinear with the controls or fixed effects"
    ):
        fit(frame, instruments="z_copy", controls="age")


def test_instrument_absorbed_by_fixed_effect(frame):
    frame["district_score"] = frame["district"] * 0.7
    with pytest.raises(EstimationError, match=r"instrument 'district_score' is collinear with the controls"):
        fit(frame, instruments="district_score", absorb="district")


def test_collinear_instruments_are_named(frame):
    frame["fibre_twice"] = 2 * frame["fibre_wave"] - 3
    with pytest.raises(
        EstimationError, match=r"instrument columns 'fibre_twice' are collinear with each other"
    ):
        fit(frame, instruments=["fibre_wave", "fibre_twice"])


def test_collinear_control_is_named(frame):
    frame["age2"] = frame["age"] * 3
    with pytest.raises(EstimationError, match=r"Control\(s\) 'age2' are constant, absorbed"):
        fit(frame, controls=["age", "age2"])


def test_same_column_in_two_roles(frame):
    with pytest.raises(InvalidInputError, match=r"Column 'age' is used as both instruments and controls"):
        fit(frame, instruments=["fibre_wave", "age"], controls="age")


def test_unknown_method_lists_valid_ones(frame):
    with pytest.raises(
        InvalidInputError, match=r"Unknown method 'gmm'; choose one of ols, 2sls, liml, fuller"
    ):
        fit(frame, method="gmm")


def test_unknown_vcov_lists_valid_ones(frame):
    with pytest.raises(
        InvalidInputError,
        match=r"Unknown vcov 'hc3'; choose one of homoskedastic, heteroskedastic, clustered",
    ):
        fit(frame, vcov="hc3")


def test_cluster_vcov_needs_cluster(frame):
    with pytest.raises(InvalidInputError, match=r"vcov='clustered' needs cluster="):
        fit(frame, vcov="clustered")


def test_cluster_with_non_cluster_vcov_is_a_conflict(frame):
    with pytest.raises(InvalidInputError, match=r"cluster= was given with vcov='heteroskedastic'"):
        fit(frame, cluster="district")


def test_ols_with_instruments_is_a_conflict(frame):
    with pytest.raises(InvalidInputError, match=r"method='ols' takes no instruments"):
        fit(frame, method="ols")


def test_iv_without_instruments(frame):
    with pytest.raises(InvalidInputError, match=r"method='liml' needs instruments="):
        fit(frame, method="liml", instruments=())


def test_three_cluster_variables(frame):
    with pytest.raises(InvalidInputError, match=r"At most two cluster variables"):
        fit(frame, vcov="clustered", cluster=["district", "clinic", "age"])


def test_load_table_unknown_extension(tmp_path: Path):
    p = tmp_path / "data.xlsx"
    p.write_text("x")
    with pytest.raises(
        InvalidInputError, match=r"data.xlsx.*unknown file extension '.xlsx'; use one of .csv"
    ):
        load_table(p)


def test_load_table_missing_file(tmp_path: Path):
    with pytest.raises(InvalidInputError, match=r"nope.csv.*no such file"):
        load_table(tmp_path / "nope.csv")


def test_load_table_unreadable_parquet(tmp_path: Path):
    p = tmp_path / "broken.parquet"
    p.write_text("not parquet at all")
    with pytest.raises(InvalidInputError, match=r"broken.parquet' as Parquet"):
        load_table(p)


def test_load_table_round_trips_three_formats(tmp_path: Path, frame):
    small = frame.head(20)
    small.to_csv(tmp_path / "d.csv", index=False)
    small.to_parquet(tmp_path / "d.parquet", index=False)
    small.to_stata(tmp_path / "d.dta", write_index=False)
    for name in ("d.csv", "d.parquet", "d.dta"):
        loaded = load_table(tmp_path / name)
        np.testing.assert_allclose(loaded["visits"].to_numpy(), small["visits"].to_numpy(), rtol=1e-12)


def test_file_sha256_matches_hashlib(tmp_path: Path):
    import hashlib

    p = tmp_path / "d.csv"
    p.write_bytes(b"a,b\n1,2\n")
    # source: Python's hashlib applied to the same bytes
    assert file_sha256(p) == hashlib.sha256(b"a,b\n1,2\n").hexdigest()
