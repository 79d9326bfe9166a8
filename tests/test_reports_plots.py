"""SVG plots: deterministic, no dates, nothing external, the AR set drawn where the statistic is below the line."""

from __future__ import annotations

import math
import re

import numpy as np
import pytest

from ivdossier.errors import InvalidInputError
from ivdossier.reports.html import clean_svg
from ivdossier.reports.inputs import ArCurve, FirstStageBins
from ivdossier.reports.plots import ar_curve_svg, ar_intervals_from_curve, first_stage_svg

BINS = FirstStageBins(
    x_bins=(1, 2, 3, 4), y_bins=(0.6, 0.5, 0.45, 0.3), x_label="fibre $wave$", y_label="share"
)


def curve(cv: float = 3.84) -> ArCurve:
    betas = np.linspace(-1.0, 1.0, 2001)
    return ArCurve(betas=tuple(betas), stats=tuple(((betas + 0.2) / 0.1) ** 2), critical_value=cv)


def test_svgs_are_deterministic_and_carry_no_date() -> None:
    a, b = first_stage_svg(BINS), first_stage_svg(BINS)
    assert a == b
    assert ar_curve_svg(curve()) == ar_curve_svg(curve())
    assert "<dc:date>" not in a and not re.search(r"20\d\d-\d\d-\d\d", a)
    assert first_stage_svg(BINS, key="other") == a  # the key names the file; it does not change the drawing


def test_svgs_pass_the_renderers_safety_check() -> None:
    clean_svg(first_stage_svg(BINS), key="first-stage")
    clean_svg(ar_curve_svg(curve()), key="ar-curve")


def test_figures_carry_no_element_ids() -> None:
    # two plots inline in one page must not collide: the figures define no ids at all
    assert "id=" not in first_stage_svg(BINS, key="one") + ar_curve_svg(curve(), key="two")


def test_ar_set_from_the_curve_matches_the_analytic_interval() -> None:
    # stat = ((b + 0.2) / 0.1)^2 <= cv  <=>  b in -0.2 +/- 0.1 sqrt(cv): solved by hand, independent of the code
    ((low, high),) = ar_intervals_from_curve(curve(3.84))
    half = 0.1 * math.sqrt(3.84)
    assert low == pytest.approx(-0.2 - half, abs=1e-3)  # grid step 0.001
    assert high == pytest.approx(-0.2 + half, abs=1e-3)


def test_ar_set_with_two_pieces_and_rays() -> None:
    betas = tuple(np.linspace(-3, 3, 601))
    stats = tuple(10 * math.exp(-(b**2)) for b in betas)  # low at both ends: two rays on the grid
    pieces = ar_intervals_from_curve(ArCurve(betas, stats, 5.0))
    assert len(pieces) == 2
    assert pieces[0][0] == pytest.approx(-3) and pieces[1][1] == pytest.approx(3)
    svg = ar_curve_svg(ArCurve(betas, stats, 5.0), ar_set=[(-math.inf, -0.83), (0.83, math.inf)])
    assert svg.count("<svg") == 1


def test_bad_plot_inputs_are_refused_with_the_fix() -> None:
    with pytest.raises(InvalidInputError, match="equally long x_bins and y_bins"):
        FirstStageBins(x_bins=(1, 2, 3), y_bins=(1, 2))
    with pytest.raises(InvalidInputError, match="non-finite"):
        FirstStageBins(x_bins=(1, float("nan")), y_bins=(1, 2))
    with pytest.raises(InvalidInputError, match="x_bins are all equal"):
        first_stage_svg(FirstStageBins(x_bins=(2, 2), y_bins=(1, 2)))
    with pytest.raises(InvalidInputError, match="critical_value must be a finite number"):
        ArCurve(betas=(0, 1), stats=(0, 1), critical_value=math.inf)
