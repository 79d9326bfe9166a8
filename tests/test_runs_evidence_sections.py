"""Every attached evidence run appears in the dossier, in a section of its kind, whether or not a linked threat asks
for it: sensitivity (with the plot of the interval against the assumed direct effect, and the breakdown value),
falsification (a table), compliers (shares and profile), power and minimum detectable effect."""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats


@pytest.fixture
def data_file(tmp_path: Path) -> Path:
    rng = np.random.default_rng(5)
    n = 1200
    z = (rng.random(n) < 0.5).astype(int)
    u = rng.normal(size=n)
    d = ((1.0 * z + 0.5 * u + rng.normal(size=n)) > 0.5).astype(int)
    frame = pd.DataFrame(
        {"y": 1.5 * d + u + rng.normal(size=n), "d": d, "z": z, "w": rng.normal(size=n) + 0.1 * u,
         "age": rng.integers(20, 80, n)}
    )  # fmt: skip
    path = tmp_path / "ev.csv"
    frame.to_csv(path, index=False)
    return path


MODEL = ("--outcome", "y", "--treatment", "d", "--instrument", "z")


def _attach_every_kind(cli, data: Path) -> dict[str, dict]:  # type: ignore[no-untyped-def,type-arg]
    """Attach one run of each kind to an instrument that has no linked threat at all."""
    assert cli("program", "add", "p", "--title", "P", "--treatment", "d", "--outcome", "y")[0] == 0
    assert cli("instrument", "add", "zz", "--program", "p", "--name", "Z", "--column", "z")[0] == 0
    out: dict[str, dict] = {}  # type: ignore[type-arg]
    jobs = {
        "estimate": ("estimate", "--data", str(data), *MODEL),
        "range": ("sensitivity", "range", "--data", str(data), *MODEL, "--direct-effect-min", "-0.05", "--direct-effect-max", "0.05"),
        "breakdown": ("sensitivity", "breakdown", "--data", str(data), *MODEL),
        "balance": ("falsify", "balance", "--data", str(data), "--instrument", "z", "--covariate", "w"),
        "compliers": ("compliers", "--data", str(data), "--treatment", "d", "--instrument", "z", "--covariate", "age"),
        "power": ("power", "--n", "4000", "--partial-r2", "0.04", "--outcome-sd", "1.5", "--treatment-sd", "0.5",
                  "--effect", "0.3"),
    }  # fmt: skip
    for name, args in jobs.items():
        code, text, err = cli(*args, "--attach", "zz", "--json")
        assert code == 0, (name, err)
        out[name] = json.loads(text)
    return out


def _dossier(cli, tmp_path: Path, suffix: str) -> str:  # type: ignore[no-untyped-def]
    path = tmp_path / f"zz{suffix}"
    code, _, err = cli("dossier", "zz", "--out", str(path))
    assert code == 0, err
    return path.read_text(encoding="utf-8")


def _section(markdown: str, title: str) -> str:
    start = markdown.index(f"\n## {title}\n")
    end = markdown.find("\n## ", start + 1)
    return markdown[start : end if end > 0 else None]


def test_each_kind_gets_its_section_without_any_linked_threat(cli, data_file: Path, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    _attach_every_kind(cli, data_file)
    text = _dossier(cli, tmp_path, ".md")
    assert "Linked threats:" not in text  # no threat is linked, so no threat asks for any of these runs
    for title in (
        "Sensitivity to a direct effect of the instrument",
        "Falsification checks",
        "Compliers",
        "Power and minimum detectable effect",
    ):
        assert f"\n## {title}\n" in text
    sens = _section(text, "Sensitivity to a direct effect of the instrument")
    assert "### Run zz-sensitivity-1 · union of intervals" in sens
    assert "### Run zz-sensitivity-2 · breakdown value" in sens
    assert "sensitivity-zz-sensitivity-1" in sens  # the plot of the interval against the direct effect
    assert "cannot tell whether it has one" in sens  # the caution travels with the numbers
    assert "passing every check cannot establish" in _section(text, "Falsification checks")
    html = _dossier(cli, tmp_path, ".html")
    # the plot (reports.sensitivity_plot.sensitivity_svg) is inlined as SVG in its figure
    figure = re.search(
        r'<figure class="figure" id="figure-sensitivity-zz-sensitivity-1">(.*?)</figure>', html, re.S
    )
    assert figure is not None and "<svg" in figure.group(1)
    assert "ivdossier-figure" not in html  # every figure marker was replaced by its SVG


def test_every_number_shown_matches_an_outside_computation(cli, data_file: Path, tmp_path: Path) -> None:  # type: ignore[no-untyped-def]
    runs = _attach_every_kind(cli, data_file)
    markdown = _dossier(cli, tmp_path, ".md")
    _breakdown_brings_the_interval_to_zero(runs, markdown, data_file)
    _balance_coefficient_matches_statsmodels(markdown, data_file)
    _complier_shares_match_the_raw_proportions(markdown, data_file)
    _power_se_and_mde_match_the_formula(markdown)


def _breakdown_brings_the_interval_to_zero(runs: dict, markdown: str, data_file: Path) -> None:  # type: ignore[type-arg]
    from ivdossier.estimation.sensitivity import union_of_intervals

    sens = _section(markdown, "Sensitivity to a direct effect of the instrument")
    assert runs["breakdown"]["covered_without_direct_effect"] is False  # the data make the check meaningful
    shown = re.search(r"reached at a direct effect of (\S+)\s*\|", sens)
    assert shown is not None
    gamma = float(shown.group(1).replace("−", "-"))
    assert gamma == pytest.approx(runs["breakdown"]["gamma"][0], rel=5e-4)  # 4 significant digits shown
    # Exact identity (the breakdown value's definition): at that direct effect one end of the interval is 0.
    frame = pd.read_csv(data_file)
    at = union_of_intervals(
        frame, outcome="y", treatment="d", instruments="z", gamma_min=gamma, gamma_max=gamma
    )
    width = at.upper - at.lower
    assert min(abs(at.lower), abs(at.upper)) < 1e-3 * width  # rounding of the shown value only


def _balance_coefficient_matches_statsmodels(markdown: str, data_file: Path) -> None:
    import statsmodels.api as sm

    from ivdossier.reports.resultview import fmt

    table = _section(markdown, "Falsification checks")
    frame = pd.read_csv(data_file)
    ref = sm.OLS(frame["w"], sm.add_constant(frame["z"])).fit()  # statsmodels, the outside reference
    row = next(line for line in table.splitlines() if line.startswith("| w | z |"))
    cells = [c.strip() for c in row.strip("|").split("|")]
    assert float(cells[2].replace("−", "-")) == pytest.approx(ref.params["z"], rel=5e-4)
    assert cells[2] == fmt(ref.params["z"])
    assert cells[5] == str(len(frame))


def _complier_shares_match_the_raw_proportions(markdown: str, data_file: Path) -> None:
    section = _section(markdown, "Compliers")
    frame = pd.read_csv(data_file)
    p1 = frame.loc[frame.z == 1, "d"].mean()  # P(D=1 | Z=1), counted by pandas
    p0 = frame.loc[frame.z == 0, "d"].mean()
    expected = {
        "complier": p1 - p0,
        "always-taker": p0,
        "never-taker": 1 - p1,
    }  # identities under monotonicity
    for group, share in expected.items():
        row = next(line for line in section.splitlines() if line.startswith(f"| {group} |"))
        value = float(row.split("|")[2].strip().replace("−", "-"))
        assert value == pytest.approx(share, abs=5e-4)  # three significant digits shown
    assert "Complier profile" in section  # the overall mean of the profile is the plain sample mean
    profile = next(line for line in section.splitlines() if line.startswith("| age |"))
    overall = float(profile.split("|")[2].strip())
    assert overall == pytest.approx(frame["age"].mean(), abs=0.01)


def _power_se_and_mde_match_the_formula(markdown: str) -> None:
    section = _section(markdown, "Power and minimum detectable effect")

    def value(label: str) -> float:
        row = next(line for line in section.splitlines() if line.startswith(f"| {label}"))
        return float(row.rstrip(" |").rsplit("|", 1)[1].strip().replace("−", "-"))

    se = value("Standard error of 2SLS")
    # Var = sigma_u^2 / (N R2 Var(X)) with the inputs given (the textbook 2SLS variance; recalled from memory)
    assert se == pytest.approx(1.5 / np.sqrt(4000 * 0.04 * 0.25), rel=5e-4)
    mde = value("Minimum detectable effect (80 % power")
    z = stats.norm.ppf(0.975)
    power_at_mde = stats.norm.cdf(mde / se - z) + stats.norm.cdf(-mde / se - z)  # two-sided test, scipy
    assert power_at_mde == pytest.approx(0.8, abs=1e-3)
    assert "cannot establish exclusion or exogeneity" in section
