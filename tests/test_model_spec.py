"""One validated model spec: the Python front end, the command line and stored runs refuse the same things alike."""

from __future__ import annotations

import dataclasses
import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.estimation import estimate
from ivdossier.estimation.spec import ModelSpec


@pytest.fixture
def frame() -> pd.DataFrame:
    rng = np.random.default_rng(11)
    n = 300
    z = rng.normal(size=n)
    u = rng.normal(size=n)
    x = z + u + rng.normal(size=n)
    return pd.DataFrame(
        {
            "y": 0.5 * x - u + rng.normal(size=n),
            "x": x,
            "z": z,
            "w1": rng.normal(size=n),
            "w2": rng.normal(size=n),
            "g": rng.integers(0, 20, n),
        }
    )


@pytest.fixture
def data_file(frame: pd.DataFrame, tmp_path: Path) -> Path:
    path = tmp_path / "d.csv"
    frame.to_csv(path, index=False)
    return path


REFUSALS = [
    # (keyword arguments of estimate(), command-line options, the one message both must give)
    ({"method": "ols", "instruments": "z"}, ["--method", "ols", "--instrument", "z"], "method='ols' takes no instruments"),
    ({"method": "2sls"}, [], "method='2sls' needs instruments="),
    ({"instruments": "z", "vcov": "clustered"}, ["--instrument", "z", "--vcov", "clustered"], "vcov='clustered' needs cluster="),
    ({"instruments": "z", "cluster": "g"}, ["--instrument", "z", "--cluster", "g"], "cluster= was given with vcov='heteroskedastic'"),
    ({"instruments": "z", "method": "gmm"}, ["--instrument", "z", "--method", "gmm"], "Unknown method 'gmm'"),
    ({"instruments": "z", "vcov": "hc3"}, ["--instrument", "z", "--vcov", "hc3"], "Unknown vcov 'hc3'"),
    ({"instruments": "z", "alpha": 1.5}, ["--instrument", "z", "--alpha", "1.5"], "alpha must lie strictly between 0 and 1"),
]  # fmt: skip


@pytest.mark.parametrize(("keywords", "options", "message"), REFUSALS)
def test_python_and_command_line_give_the_same_refusal(  # type: ignore[no-untyped-def]
    cli, frame: pd.DataFrame, data_file: Path, keywords: dict, options: list[str], message: str
) -> None:
    with pytest.raises(InvalidInputError, match=message) as python_error:
        estimate(frame, outcome="y", treatment="x", **keywords)
    code, _out, err = cli(
        "estimate", "--data", str(data_file), "--outcome", "y", "--treatment", "x", *options
    )
    assert code != 0
    assert str(python_error.value) in " ".join(err.split())  # the same sentence, whatever the line wrapping


def test_a_spec_is_validated_whenever_it_is_built() -> None:
    with pytest.raises(InvalidInputError, match="method='ols' takes no instruments"):
        ModelSpec(outcome="y", treatment=("x",), instruments=("z",), method="ols")
    spec = ModelSpec.build(outcome="y", treatment="x", instruments="z")
    with pytest.raises(InvalidInputError, match="vcov='clustered' needs cluster="):
        dataclasses.replace(spec, vcov="clustered")


def test_build_accepts_one_name_or_a_list_and_stores_tuples() -> None:
    spec = ModelSpec.build(
        outcome="y", treatment="x", instruments=["z"], controls="w1", cluster="g", vcov="clustered"
    )
    assert spec.treatment == ("x",) and spec.instruments == ("z",) and spec.controls == ("w1",)
    assert spec.cluster == ("g",)
    assert spec.adjustment()["cluster"] == ("g",)
    assert ModelSpec.build(outcome="y", treatment="x", instruments="z").adjustment()["cluster"] is None


def test_keyword_front_end_and_spec_give_identical_numbers(frame: pd.DataFrame) -> None:
    from ivdossier.estimation.api import estimate_spec

    by_keywords = estimate(frame, outcome="y", treatment="x", instruments="z", controls=["w1", "w2"])
    by_spec = estimate_spec(
        frame, ModelSpec.build(outcome="y", treatment="x", instruments="z", controls=("w1", "w2"))
    )
    # exact identity: the same code path after the spec is built
    assert np.array_equal(by_keywords.coef, by_spec.coef) and np.array_equal(by_keywords.cov, by_spec.cov)


def test_control_accepts_a_comma_separated_list(cli, frame: pd.DataFrame, data_file: Path) -> None:  # type: ignore[no-untyped-def]
    base = [
        "estimate",
        "--data",
        str(data_file),
        "--outcome",
        "y",
        "--treatment",
        "x",
        "--instrument",
        "z",
        "--json",
    ]
    code, out, err = cli(*base, "--control", "w1,w2")
    assert code == 0, err
    code2, out2, err2 = cli(*base, "--control", "w1", "--control", "w2")
    assert code2 == 0, err2
    listed, repeated = json.loads(out), json.loads(out2)
    assert listed["spec"]["controls"] == ["w1", "w2"] == repeated["spec"]["controls"]
    reference = estimate(frame, outcome="y", treatment="x", instruments="z", controls=["w1", "w2"])
    # the same model as the Python call (exact identity of code paths; printed JSON keeps full float precision)
    assert listed["coef"]["x"] == pytest.approx(reference.coef_of("x"), rel=1e-12)
    assert listed["coef"] == repeated["coef"]


def test_a_stored_spec_rebuilds_into_the_same_validated_spec(frame: pd.DataFrame) -> None:
    from ivdossier.estimation.api import estimate_spec

    spec = ModelSpec.build(
        outcome="y", treatment="x", instruments=["z"], controls=["w1"], cluster="g", vcov="clustered"
    )
    result = estimate_spec(frame, spec)
    assert ModelSpec.from_echo({"data": "d.csv", **result.spec}) == spec  # the run's stored spec is the spec
    with pytest.raises(InvalidInputError, match="method='ols' takes no instruments"):
        ModelSpec.from_echo({**result.spec, "method": "ols"})  # a plan naming OLS with instruments is refused


def test_evidence_functions_and_commands_share_the_spec_checks(  # type: ignore[no-untyped-def]
    cli, frame: pd.DataFrame, data_file: Path
) -> None:
    from ivdossier.estimation.falsification import balance

    with pytest.raises(
        InvalidInputError, match="cluster= was given with vcov='heteroskedastic'"
    ) as python_error:
        balance(frame, instruments="z", covariates=["w1"], cluster="g")
    code, _out, err = cli("falsify", "balance", "--data", str(data_file), "--instrument", "z",
                          "--covariate", "w1", "--cluster", "g")  # fmt: skip
    assert code != 0
    assert str(python_error.value) in " ".join(err.split())  # one message for one mistake, on every path


def test_estimate_file_takes_a_spec_or_the_same_keywords(data_file: Path) -> None:
    from ivdossier.workflows.runs import estimate_file

    by_spec = estimate_file(data_file, ModelSpec.build(outcome="y", treatment="x", instruments="z"))
    by_keywords = estimate_file(data_file, outcome="y", treatment="x", instruments="z")
    assert np.array_equal(by_spec.result.coef, by_keywords.result.coef)  # exact identity: one code path
    with pytest.raises(InvalidInputError, match="method='ols' takes no instruments"):
        estimate_file(data_file, outcome="y", treatment="x", instruments="z", method="ols")


def test_the_covariance_words_and_their_old_spellings_for_one_release(cli, tmp_path) -> None:  # type: ignore[no-untyped-def]
    import warnings

    from ivdossier.estimation.covariance import OLD_COV_NAMES, CovSpec
    from ivdossier.workflows.plan_check import OLD_COV_WORDS

    assert (
        OLD_COV_WORDS
        == OLD_COV_NAMES
        == {
            "unadjusted": "homoskedastic",
            "robust": "heteroskedastic",
            "cluster": "clustered",
        }
    )
    # the library: an old word warns once and means the new one; a stored spec reads silently
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        spec = ModelSpec.build(outcome="y", treatment="x", instruments="z", vcov="robust")
    assert spec.vcov == "heteroskedastic"
    assert [str(w.message) for w in caught] == [
        "vcov='robust' is deprecated and will be removed in the next release; use vcov='heteroskedastic'."
    ]
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        stored = ModelSpec.from_echo({"outcome": "y", "treatment": ["x"], "instruments": ["z"], "cluster": ["g"],
                                      "vcov": "cluster"})  # fmt: skip
    assert stored.vcov == "clustered"
    assert CovSpec("unadjusted").kind == "homoskedastic"  # stored results name the old kinds
    # the command line: the old word works with a note on stderr and gives the same numbers
    rng = np.random.default_rng(8)
    n = 200
    z, u = rng.normal(size=n), rng.normal(size=n)
    x = z + u + rng.normal(size=n)
    data = tmp_path / "d.csv"
    pd.DataFrame({"y": x + u, "x": x, "z": z, "g": rng.integers(0, 30, n)}).to_csv(data, index=False)
    base = ("estimate", "--data", str(data), "--outcome", "y", "--treatment", "x", "--instrument", "z",
            "--cluster", "g", "--json")  # fmt: skip
    code, new, err_new = cli(*base, "--vcov", "clustered")
    assert code == 0
    code, old, err_old = cli(*base, "--vcov", "cluster")
    assert code == 0 and json.loads(old) == json.loads(new) and json.loads(new)["vcov"] == "clustered"
    note = "warning: --vcov cluster is deprecated and will be removed in the next release; use --vcov clustered.\n"
    assert err_old == note + err_new
    code, _, err = cli(*base, "--vcov", "sandwich")
    assert (
        code == 2
        and "Unknown vcov 'sandwich'; choose one of homoskedastic, heteroskedastic, clustered." in err
    )


def test_the_vocabulary_names_the_stored_spec_keys_in_the_echo_order() -> None:
    from ivdossier.vocabulary import SPEC_KEYS

    spec = ModelSpec.build(outcome="y", treatment="x", instruments="z")
    assert tuple(spec.echo()) == SPEC_KEYS  # documents and plan comparison list the keys from the vocabulary
