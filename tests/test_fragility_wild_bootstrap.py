"""The wild restricted efficient bootstrap (Davidson and MacKinnon 2010) reproduces refits draw by draw.

With 10 clusters and Rademacher weights every one of the 2^10 sign vectors is used, so the bootstrap
distribution is deterministic: each test rebuilds the bootstrap samples in the test itself (restricted OLS,
efficient first stage, new outcome and treatment) and refits them with the project's plain estimator, and the
Anderson–Rubin bootstrap is checked against the `wildboottest` package's restricted wild cluster bootstrap.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.api import fit_arrays
from ivdossier.estimation.fragility_data import fragility_data
from ivdossier.estimation.wild_bootstrap import (
    all_sign_vectors,
    bootstrap_weights,
    invert_test,
    wild_bootstrap,
)


def few_clusters(seed: int = 3, g: int = 10, n: int = 240, fe: bool = False) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    cl = rng.integers(0, g, n)
    site = cl * 2 + rng.integers(0, 2, n)  # nested in the clusters
    month = rng.integers(0, 3, n)  # not nested
    c = rng.normal(size=n)
    z = rng.normal(size=n) + 0.4 * rng.normal(size=g)[cl]
    u = rng.normal(size=n) * (1 + 0.5 * np.abs(z)) + rng.normal(size=g)[cl]
    x = 0.6 * z + 0.5 * u + rng.normal(size=n) + 0.3 * c + (0.2 * site if fe else 0)
    y = 1.0 * x + u + 0.4 * c + (0.1 * month if fe else 0)
    return pd.DataFrame({"y": y, "x": x, "z": z, "c": c, "cl": cl, "site": site, "month": month})


def brute_force_draws(
    frame: pd.DataFrame,
    b0: float,
    v: np.ndarray,
    *,
    cluster: bool,
    absorb: tuple[str, ...] = (),
    weights: np.ndarray | None = None,
    inst: tuple[str, ...] = ("z",),
) -> tuple[np.ndarray, np.ndarray]:
    """Independent WRE: build each bootstrap sample explicitly and refit it (t via fit_arrays, AR via statsmodels).

    With weights the restricted and first-stage regressions are weighted least squares and the refits weighted.
    """
    n = len(frame)
    sw = np.ones(n) if weights is None else np.sqrt(weights)
    ones = np.ones(n)
    dummies = [pd.get_dummies(frame[a], drop_first=True).to_numpy(float) for a in absorb]
    w = np.column_stack([ones, frame.c.to_numpy(), *dummies])  # exogenous columns of the structural equation
    zfull = np.column_stack([w, frame[list(inst)].to_numpy()])
    y, x = frame.y.to_numpy(), frame.x.to_numpy()
    # restricted structural residuals: y - b0 x on the exogenous columns
    gam = np.linalg.lstsq(w * sw[:, None], (y - b0 * x) * sw, rcond=None)[0]
    u = y - b0 * x - w @ gam
    # efficient first stage: x on all instruments and u; residuals keep the u part
    coef = np.linalg.lstsq(np.column_stack([zfull, u]) * sw[:, None], x * sw, rcond=None)[0]
    pi = coef[:-1]
    vres = x - zfull @ pi
    # draw row k belongs to the k-th cluster in order of first appearance (as the module numbers them)
    codes = pd.factorize(frame.cl, sort=False)[0] if cluster else np.arange(n)
    t_stats, ar_stats = [], []
    for b in range(v.shape[1]):
        mult = v[codes, b]
        xs = zfull @ pi + vres * mult
        ys = b0 * xs + w @ gam + u * mult
        beta, cov = fit_arrays(
            ys,
            xs,
            frame[list(inst)].to_numpy(),
            controls=np.column_stack([frame.c.to_numpy(), *dummies]),
            clusters=(codes,) if cluster else (),
            vcov="clustered" if cluster else "robust",
            weights=weights,
        )
        t_stats.append((beta[0] - b0) / math.sqrt(cov[0, 0]))
        ols = sm.WLS(ys - b0 * xs, zfull, weights=np.ones(n) if weights is None else weights).fit(
            cov_type="cluster" if cluster else "HC1", cov_kwds={"groups": codes} if cluster else None
        )
        k = len(inst)
        coef_z = np.asarray(ols.params)[-k:]
        cov_z = np.asarray(ols.cov_params())[-k:, -k:]
        ar_stats.append(float(coef_z @ np.linalg.solve(cov_z, coef_z)))
    return np.abs(np.array(t_stats)), np.array(ar_stats)


def plain_refits(frame: pd.DataFrame, b0: float, v: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Independent WRE in plain numpy with every regressor explicit (no partialling): |t| and AR Wald per draw."""
    n = len(frame)
    codes = pd.factorize(frame.cl, sort=False)[0]
    g = codes.max() + 1
    w = np.column_stack([np.ones(n), frame.c])
    zfull = np.column_stack([w, frame.z])
    y, x = frame.y.to_numpy(), frame.x.to_numpy()
    gam = np.linalg.lstsq(w, y - b0 * x, rcond=None)[0]
    u = y - b0 * x - w @ gam
    coef = np.linalg.lstsq(np.column_stack([zfull, u]), x, rcond=None)[0]
    pi, vres = coef[:-1], x - zfull @ coef[:-1]
    xfull_fixed = w
    pz = zfull @ np.linalg.solve(zfull.T @ zfull, zfull.T)
    k = 3  # x, intercept, c
    factor_t = g / (g - 1) * (n - 1) / (n - k)
    factor_ar = g / (g - 1) * (n - 1) / (n - 3)  # z, intercept, c
    out_t, out_ar = [], []
    for b in range(v.shape[1]):
        mult = v[codes, b]
        xs = zfull @ pi + vres * mult
        ys = b0 * xs + w @ gam + u * mult
        xmat = np.column_stack([xs, xfull_fixed])
        xhat = pz @ xmat
        bread = np.linalg.inv(xhat.T @ xmat)
        beta = bread @ (xhat.T @ ys)
        e = ys - xmat @ beta
        sc = np.array([xhat[codes == h].T @ e[codes == h] for h in range(g)])
        cov = factor_t * bread @ sc.T @ sc @ bread.T
        out_t.append(abs(beta[0] - b0) / np.sqrt(cov[0, 0]))
        ar_y = ys - b0 * xs
        ols_b = np.linalg.solve(zfull.T @ zfull, zfull.T @ ar_y)
        r = ar_y - zfull @ ols_b
        sc = np.array([zfull[codes == h].T @ r[codes == h] for h in range(g)])
        zinv = np.linalg.inv(zfull.T @ zfull)
        cov = factor_ar * zinv @ sc.T @ sc @ zinv
        out_ar.append(ols_b[-1] ** 2 / cov[-1, -1])
    return np.array(out_t), np.array(out_ar)


def test_enumerated_wild_bootstrap_equals_brute_force_refits_on_ten_clusters() -> None:
    frame = few_clusters()
    fd = fragility_data(frame, outcome="y", treatment="x", instruments="z", controls="c", cluster="cl")
    res = wild_bootstrap(fd, null=0.4, confidence_sets=False)
    assert res.enumerated and res.draws == 1024 and res.weights == "rademacher"
    v = all_sign_vectors(10)
    t_bf, ar_bf = plain_refits(frame, 0.4, v)
    t_obs, ar_obs = plain_refits(frame, 0.4, np.ones((10, 1)))
    # exact identity: the bootstrap p-value is the share of the 1024 refits at least as extreme (full enumeration)
    assert res.t_test is not None and res.anderson_rubin is not None
    assert res.t_test.statistic == pytest.approx(t_obs[0], rel=1e-9)
    assert res.t_test.p_value == pytest.approx(np.mean(t_bf >= t_obs[0] * (1 - 1e-9)), abs=1e-12)
    assert res.anderson_rubin.statistic == pytest.approx(ar_obs[0], rel=1e-9)  # one instrument: F = Wald
    assert res.anderson_rubin.p_value == pytest.approx(np.mean(ar_bf >= ar_obs[0] * (1 - 1e-9)), abs=1e-12)


def test_bootstrap_statistics_match_refits_draw_by_draw_with_nested_and_crossed_fixed_effects() -> None:
    from ivdossier.estimation.wild_bootstrap import _Engine

    frame = few_clusters(seed=11, fe=True)
    v = all_sign_vectors(10)[:, ::37]
    for absorb in (("site",), ("month",)):
        fd = fragility_data(
            frame, outcome="y", treatment="x", instruments="z", controls="c", absorb=absorb, cluster="cl"
        )
        assert (fd.base is not None) == (absorb == ("site",))  # site is nested in the clusters, month is not
        engine = _Engine(fd)
        a0 = engine.at_null(0.7)
        t_bf, ar_bf = brute_force_draws(frame, 0.7, v, cluster=True, absorb=absorb)
        # the refits count dummies as controls; the module leaves levels nested in a cluster out of the cluster
        # factor (covariance.py convention), which rescales every draw by the same known ratio
        n, p_full = len(frame), fd.prepared.n_partialled
        p_c = p_full - fd.prepared.n_partialled_nested
        ratio_t = (n - 1 - p_full) / (n - 1 - p_c)
        ratio_ar = (n - 1 - p_full) / (n - 1 - p_c)
        # exact identity: per-cluster algebra (or re-partialling) equals explicit refits, draw by draw
        np.testing.assert_allclose(engine.t_stats(a0, v) ** 2 * ratio_t, t_bf**2, rtol=1e-8)
        np.testing.assert_allclose(engine.ar_stats(a0, v) * ratio_ar, ar_bf, rtol=1e-8)


def test_weighted_model_draws_match_weighted_refits() -> None:
    from ivdossier.estimation.wild_bootstrap import _Engine

    frame = few_clusters(seed=17)
    frame["w"] = np.random.default_rng(1).uniform(0.3, 3.0, len(frame))
    fd = fragility_data(
        frame, outcome="y", treatment="x", instruments="z", controls="c", cluster="cl", weights="w"
    )
    engine = _Engine(fd)
    v = all_sign_vectors(10)[:, ::41]
    t_bf, ar_bf = brute_force_draws(frame, 0.9, v, cluster=True, weights=frame.w.to_numpy())
    a0 = engine.at_null(0.9)
    # exact identity: analytic weights, bootstrap errors built in the original units and refitted with weights
    np.testing.assert_allclose(np.abs(engine.t_stats(a0, v)), t_bf, rtol=1e-8)
    np.testing.assert_allclose(engine.ar_stats(a0, v), ar_bf, rtol=1e-8)


def test_two_instruments_draws_match_refits() -> None:
    from ivdossier.estimation.wild_bootstrap import _Engine

    frame = few_clusters(seed=23)
    frame["z2"] = np.random.default_rng(3).normal(size=len(frame)) + 0.3 * frame.c
    frame["x"] = frame.x + 0.5 * frame.z2
    fd = fragility_data(
        frame, outcome="y", treatment="x", instruments=["z", "z2"], controls="c", cluster="cl"
    )
    engine = _Engine(fd)
    v = all_sign_vectors(10)[:, ::53]
    t_bf, ar_bf = brute_force_draws(frame, 0.8, v, cluster=True, inst=("z", "z2"))
    a0 = engine.at_null(0.8)
    # exact identity with refits; the AR statistic is the joint Wald statistic of both instruments
    np.testing.assert_allclose(np.abs(engine.t_stats(a0, v)), t_bf, rtol=1e-8)
    np.testing.assert_allclose(engine.ar_stats(a0, v), ar_bf, rtol=1e-8)
    res = wild_bootstrap(fd, null=0.8, confidence_sets=False)
    assert res.anderson_rubin is not None
    all_ar = engine.ar_stats(a0, all_sign_vectors(10))  # the per-draw path checked against refits above
    _, obs_ar = brute_force_draws(frame, 0.8, np.ones((10, 1)), cluster=True, inst=("z", "z2"))
    # full enumeration: the AR table (a ratio of quadratics in b0 per draw) gives the same exact p-value
    assert res.anderson_rubin.p_value == pytest.approx(np.mean(all_ar >= obs_ar[0] * (1 - 1e-9)), abs=1e-12)
    assert res.anderson_rubin.statistic == pytest.approx(obs_ar[0] / 2, rel=1e-9)


def test_heteroskedastic_draws_with_crossed_fixed_effects_match_refits() -> None:
    from ivdossier.estimation.wild_bootstrap import _Engine

    frame = few_clusters(seed=19, n=60, fe=True)
    fd = fragility_data(frame, outcome="y", treatment="x", instruments="z", controls="c", absorb="month")
    assert fd.base is None  # rows are the resampling units, so the fixed effect is re-partialled per draw
    engine = _Engine(fd)
    v = bootstrap_weights("webb", 60, 12, np.random.default_rng(2))
    t_bf, ar_bf = brute_force_draws(frame, 0.6, v, cluster=False, absorb=("month",))
    a0 = engine.at_null(0.6)
    # exact identity with refits (same HC1 degrees of freedom: dummies and absorbed levels count alike)
    np.testing.assert_allclose(np.abs(engine.t_stats(a0, v)), t_bf, rtol=1e-8)
    np.testing.assert_allclose(engine.ar_stats(a0, v), ar_bf, rtol=1e-8)


def test_heteroskedastic_webb_draws_match_refits() -> None:
    frame = few_clusters(seed=5, n=80)
    fd = fragility_data(frame, outcome="y", treatment="x", instruments="z", controls="c")
    res = wild_bootstrap(fd, null=1.2, draws=40, weights="webb", seed=9, confidence_sets=False)
    assert not res.enumerated and res.draws == 40 and res.seed == 9
    v = bootstrap_weights("webb", 80, 40, np.random.default_rng(9))
    t_bf, ar_bf = brute_force_draws(frame, 1.2, v, cluster=False)
    t_obs, ar_obs = brute_force_draws(frame, 1.2, np.ones((80, 1)), cluster=False)
    assert res.t_test is not None and res.anderson_rubin is not None
    # exact identity: same draws, refit per draw (statsmodels HC1 for the AR regression)
    assert res.t_test.p_value == pytest.approx(np.mean(t_bf >= t_obs[0] * (1 - 1e-9)), abs=1e-12)
    assert res.anderson_rubin.p_value == pytest.approx(np.mean(ar_bf >= ar_obs[0] * (1 - 1e-9)), abs=1e-12)


def test_anderson_rubin_bootstrap_equals_wildboottest_restricted_cluster_bootstrap() -> None:
    from wildboottest.wildboottest import WildboottestCL

    frame = few_clusters(seed=21)
    b0 = 0.8
    fd = fragility_data(frame, outcome="y", treatment="x", instruments="z", controls="c", cluster="cl")
    from ivdossier.estimation.wild_bootstrap import _Engine

    engine = _Engine(fd)
    v = all_sign_vectors(10)
    mine = engine.ar_stats(engine.at_null(b0), v)
    xmat = np.column_stack([frame.z, np.ones(len(frame)), frame.c])
    wb = WildboottestCL(
        X=xmat,
        Y=(frame.y - b0 * frame.x).to_numpy(),
        cluster=frame.cl.to_numpy(),
        R=np.array([1.0, 0, 0]),
        B=9999,
    )
    wb.get_scores(bootstrap_type="11", impose_null=True)
    _, b_used, enumerated = wb.get_weights(weights_type="rademacher")
    wb.get_numer()
    wb.get_denom()
    wb.get_tboot()
    wb.get_vcov()
    wb.get_tstat()
    wb.get_pvalue()
    assert enumerated and b_used == 1024
    # wildboottest (WCR, CRV1 with G/(G-1)(N-1)/(N-k)): its bootstrap t^2 are our AR Wald statistics
    np.testing.assert_allclose(np.sort(mine), np.sort(np.asarray(wb.t_boot).ravel() ** 2), rtol=1e-8)
    res = wild_bootstrap(fd, null=b0, tests=("ar",), confidence_sets=False)
    assert res.anderson_rubin is not None
    stat = res.anderson_rubin.statistic
    assert stat == pytest.approx(float(np.asarray(wb.t_stat).ravel()[0]) ** 2, rel=1e-9)
    # wildboottest counts strictly larger draws; ours counts ties (the all-plus draw reproduces the sample)
    assert res.anderson_rubin.p_value == pytest.approx(float(wb.pvalue) + 1 / 1024, abs=1 / 1024 + 1e-12)


def test_confidence_set_ends_have_p_values_on_either_side_of_alpha() -> None:
    frame = few_clusters(seed=8)
    fd = fragility_data(frame, outcome="y", treatment="x", instruments="z", controls="c", cluster="cl")
    res = wild_bootstrap(fd, null=0.0)
    assert res.t_test is not None and res.t_test.intervals is not None
    assert len(res.t_test.intervals) == 1
    lo, hi = res.t_test.intervals[0]
    width = hi - lo
    for end, inside in ((lo, lo + 1e-3 * width), (hi, hi - 1e-3 * width)):
        outside = end + (end - inside)
        # definition of test inversion: just inside is accepted, just outside rejected
        assert wild_bootstrap(fd, null=inside, confidence_sets=False, tests=("t",)).t_test.p_value > 0.05  # type: ignore[union-attr]
        assert wild_bootstrap(fd, null=outside, confidence_sets=False, tests=("t",)).t_test.p_value <= 0.05  # type: ignore[union-attr]


def test_invert_test_finds_known_interval_and_rays() -> None:
    # definition: the accepted set of a known rule
    got = invert_test(lambda b: 1.0 if -1.3 <= b <= 2.1 else 0.0, 0.05, 0.0, 1.0)
    assert got[0][0] == pytest.approx(-1.3, abs=1e-4) and got[0][1] == pytest.approx(2.1, abs=1e-4)
    rays = invert_test(lambda b: min(abs(b) / 4, 1.0), 0.5, 0.0, 1.0)
    assert rays[0][0] == -math.inf and rays[1][1] == math.inf
    assert rays[0][1] == pytest.approx(-2.0, abs=1e-4) and rays[1][0] == pytest.approx(2.0, abs=1e-4)


def test_same_seed_same_result_and_progress_reaches_total() -> None:
    frame = few_clusters(seed=2, g=30, n=300)
    fd = fragility_data(frame, outcome="y", treatment="x", instruments="z", cluster="cl")
    calls: list[tuple[int, int]] = []
    a = wild_bootstrap(
        fd, draws=199, seed=4, confidence_sets=False, progress=lambda d, t: calls.append((d, t))
    )
    b = wild_bootstrap(fd, draws=199, seed=4, confidence_sets=False)
    assert a.to_dict() == b.to_dict() and not a.enumerated
    assert calls and calls[-1][0] == calls[-1][1]
    assert "199 draws" in str(a) and "rademacher" in str(a)


def test_several_treatments_are_not_applicable_and_bad_options_are_named() -> None:
    frame = few_clusters()
    frame["x2"] = frame.x + np.random.default_rng(0).normal(size=len(frame))
    frame["z2"] = frame.z**2
    fd = fragility_data(frame, outcome="y", treatment=["x", "x2"], instruments=["z", "z2"], cluster="cl")
    res = wild_bootstrap(fd)
    assert not res.applicable and "one endogenous regressor" in (res.reason or "")
    fd1 = fragility_data(frame, outcome="y", treatment="x", instruments="z", cluster="cl")
    with pytest.raises(InvalidInputError, match="Unknown wild weight type 'mammen'"):
        wild_bootstrap(fd1, weights="mammen")


@pytest.mark.parametrize(
    ("spec", "kind"),
    [
        ({"controls": "c"}, "webb"),
        ({"controls": "c", "weights": "w"}, "rademacher"),
        ({"absorb": "site"}, "webb"),
        ({"absorb": "site", "controls": "c"}, "rademacher"),
    ],
)
def test_closed_form_t_table_equals_the_per_draw_computation(spec: dict[str, str], kind: str) -> None:
    from ivdossier.estimation.wild_bootstrap import _Engine, _TTable

    frame = few_clusters(seed=29, fe=True)
    frame["w"] = np.random.default_rng(4).uniform(0.5, 2.0, len(frame))
    fd = fragility_data(frame, outcome="y", treatment="x", instruments="z", cluster="cl", **spec)  # type: ignore[arg-type]
    engine = _Engine(fd)
    engine.prepare_t_table()
    v = np.column_stack([np.ones(10), bootstrap_weights(kind, 10, 60, np.random.default_rng(8))])
    table = _TTable(engine, engine.t_parts(v))
    for b0 in (-2.0, 0.3, 1.0, 4.5):
        # exact algebraic identity: the expanded sum of squared scores equals the direct per-draw computation,
        # which the tests above check against refits
        np.testing.assert_allclose(table.stats(b0), engine.t_stats(engine.at_null(b0), v), rtol=1e-7)
