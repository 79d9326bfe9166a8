"""Anderson–Rubin inference on one of several treatments.

Checks: with one treatment it is the existing Anderson–Rubin test and set (every covariance); the
homoskedastic subvector test, its set and the GKM (2019) conditional p-value and set match the `ivmodels`
package; the robust projection set's ends are where a brute-force grid minimum over the nuisance coefficient
reaches the joint critical value.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.covariance import CovSpec, sandwich
from ivdossier.estimation.data import prepare
from ivdossier.estimation.robust_inference import anderson_rubin
from ivdossier.estimation.subvector import (
    gkm_conditional_p_value,
    subvector_anderson_rubin,
    subvector_ar_prepared,
)


def two_treatments(seed: int = 0, n: int = 400) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)
    z = rng.normal(size=(n, 3))
    u = rng.normal(size=n) * (1 + 0.5 * np.abs(z[:, 0]))
    x = np.column_stack(
        [
            z @ [1.0, 0.3, 0.2] + 0.5 * u + rng.normal(size=n),
            z @ [0.1, 0.8, 0.3] + 0.3 * u + rng.normal(size=n),
        ]
    )
    y = x @ [0.5, -0.3] + u
    return y - y.mean(), x - x.mean(axis=0), z - z.mean(axis=0)


@pytest.mark.parametrize("kind", ["homoskedastic", "heteroskedastic", "clustered"])
def test_one_treatment_reduces_to_the_existing_anderson_rubin(kind: str) -> None:
    y, x, z = two_treatments(seed=2)
    groups = np.arange(len(y)) % 25
    spec = CovSpec(kind, (groups,) if kind == "clustered" else ())  # type: ignore[arg-type]
    mine = subvector_anderson_rubin(y, x[:, :1], z, index=0, spec=spec, n_partialled=1, null=0.2)
    ref = anderson_rubin(y, x[:, :1], z, spec=spec, n_partialled=1, null=np.array([0.2]))
    # identity with the project's one-treatment AR (statistic, p-value and set)
    assert mine.statistic == pytest.approx(ref.statistic, rel=1e-9)
    assert mine.p_value == pytest.approx(ref.p_value, rel=1e-8)
    assert (
        mine.intervals is not None and ref.intervals is not None and len(mine.intervals) == len(ref.intervals)
    )
    for a, b in zip(mine.intervals, ref.intervals, strict=True):
        assert a == pytest.approx(b, rel=1e-6)


def test_homoskedastic_subvector_test_and_set_match_ivmodels() -> None:
    from ivmodels.tests.anderson_rubin import anderson_rubin_test, inverse_anderson_rubin_test

    y, x, z = two_treatments()
    res = subvector_anderson_rubin(y, x, z, index=0, spec=CovSpec("homoskedastic"), n_partialled=0, null=0.4)
    # ivmodels on centred data without an intercept uses the same degrees of freedom as n_partialled=0
    stat, p_f = anderson_rubin_test(
        z, x[:, [0]], y, np.array([0.4]), W=x[:, [1]], critical_values="f", fit_intercept=False
    )
    _, p_gkm = anderson_rubin_test(
        z, x[:, [0]], y, np.array([0.4]), W=x[:, [1]], critical_values="gkm", fit_intercept=False
    )
    assert res.statistic == pytest.approx(float(stat), rel=1e-9)  # ivmodels subvector AR, F form
    assert res.p_value == pytest.approx(float(p_f), rel=1e-8)
    assert res.conditional_p_value == pytest.approx(float(p_gkm), rel=1e-6)  # ivmodels GKM (2019) p-value
    cs_f = inverse_anderson_rubin_test(z, x[:, [0]], y, W=x[:, [1]], critical_values="f", fit_intercept=False)
    cs_gkm = inverse_anderson_rubin_test(
        z, x[:, [0]], y, W=x[:, [1]], critical_values="gkm", fit_intercept=False
    )
    assert res.intervals is not None and res.conditional_intervals is not None
    assert res.intervals[0] == pytest.approx(tuple(np.ravel(cs_f._boundary())), rel=1e-6)  # ivmodels F set
    assert res.conditional_intervals[0] == pytest.approx(cs_gkm.boundaries[0], rel=1e-5)  # ivmodels GKM set
    # the conditional test is more powerful: its set lies inside the unconditional chi2-type set
    assert res.conditional_intervals[0][0] >= res.intervals[0][0] - 1e-9


def test_gkm_density_matches_ivmodels_critical_value_function() -> None:
    from ivmodels.tests.anderson_rubin import (
        more_powerful_subvector_anderson_rubin_critical_value_function as f,
    )

    for stat, kappa, k in [(3.0, 20.0, 3), (1.0, 4.0, 2), (7.5, 9.0, 5), (0.3, 150.0, 4)]:
        # ivmodels implements GKM (2019) eq. A.21 with the closed-form 1F1 normaliser
        assert gkm_conditional_p_value(stat, kappa, k - 1) == pytest.approx(
            f(stat, kappa, k=k, mw=1), rel=1e-7
        )


def test_conditional_p_value_tends_to_chi_square_when_kappa_max_is_large() -> None:
    # GKM (2019): as the largest root grows, the conditional distribution approaches chi2(k - m_W)
    assert gkm_conditional_p_value(5.0, 1e5, 2) == pytest.approx(stats.chi2.sf(5.0, 2), rel=1e-4)


def test_robust_projection_set_ends_are_where_the_minimised_joint_statistic_hits_the_critical_value() -> None:
    y, x, z = two_treatments(seed=5)
    spec = CovSpec("heteroskedastic")
    res = subvector_anderson_rubin(y, x, z, index=1, spec=spec, n_partialled=0)
    assert res.applicable and "projection" in (res.version or "")
    assert res.intervals is not None and len(res.intervals) == 1
    crit = 3 * stats.f.ppf(0.95, 3, len(y) - 3)
    gammas = np.linspace(-3, 3, 6001)

    def brute_min(b: float) -> float:
        """Joint robust AR Wald over a dense grid of the other coefficient, refitting the regression each time."""
        best = math.inf
        for gm in gammas[::20]:
            e = y - x[:, 1] * b - x[:, 0] * gm
            coef = np.linalg.lstsq(z, e, rcond=None)[0]
            cov = sandwich(z, e - z @ coef, spec, n_partialled=0)
            best = min(best, float(coef @ np.linalg.solve(cov, coef)))
        return best

    lo, hi = res.intervals[0]
    for end, inward in ((lo, 1.0), (hi, -1.0)):
        width = hi - lo
        # brute force (grid minimum, an upper bound of the true minimum): accepted just inside the end
        assert brute_min(end + inward * 0.02 * width) <= crit
        # and the module's minimum is at least the brute-force one's rejection just outside
        assert brute_min(end - inward * 0.02 * width) > crit * 0.999


def test_prepared_wrapper_names_treatments_and_rejects_unknown_ones() -> None:
    y, x, z = two_treatments(seed=7, n=300)
    frame = pd.DataFrame({"y": y, "a": x[:, 0], "b": x[:, 1], "z1": z[:, 0], "z2": z[:, 1], "z3": z[:, 2]})
    prep = prepare(frame, outcome="y", treatment=["a", "b"], instruments=["z1", "z2", "z3"])
    res = subvector_ar_prepared(prep, treatment="b", vcov="homoskedastic", confidence_set=False)
    assert res.treatment == "b" and res.nuisance == ("a",) and res.intervals is None
    assert "b with a unrestricted" in str(res)
    with pytest.raises(InvalidInputError, match="'c' is not a treatment"):
        subvector_ar_prepared(prep, treatment="c")
