"""Why the jackknife Anderson-Rubin test rejects more than 5% with 50-200 clerk dummies: skewness and noise.

Prints figures; it is not a test. Same invented design as ``sim_jackknife_ar_size.py`` (K + 1 clerks with 10 cases
each, heteroskedastic errors, H0 true), so the first stage plays no part: under H0 the statistic involves only
e = y - b0 x. For each K the script prints the Monte Carlo rejection rate at nominal 5% (one-sided, as in
Mikusheva and Sun 2022) of

- the statistic as implemented (``decision_maker_anderson_rubin``: cross-fit variance estimate Phi-hat);
- an oracle statistic: the same numerator sum_{i != j} P_ij e_i e_j divided by its exact standard deviation
  sqrt(2 sum_{i != j} P_ij^2 s_i s_j), with the true errors and the true variances s_i. It has mean 0 and variance
  1 exactly, so any excess rejection it shows is the shape of the numerator's distribution, not the variance
  estimator;

the mean of the implemented variance estimate over the exact variance of the numerator (the cross-fit Phi-hat is
unbiased when the errors are independent with mean zero, up to the O(1/n) effect of partialling the intercept:
E[e_i (M e)_i e_j (M e)_j] = (M_ii M_jj + M_ij^2) s_i s_j for i != j), and the exact skewness of the oracle statistic for Gaussian errors (third cumulant of a quadratic form xi'B xi,
B = H A H with A the zero-diagonal P and H = diag(sqrt(s)): 8 tr(B^3) / (2 tr(B^2))^{3/2}), with the one-term
Cornish-Fisher (Edgeworth) approximation of the rejection rate that this skewness implies,
1 - Phi(z - g (z^2 - 1) / 6). A right-skewed numerator makes a one-sided upper-tail normal test over-reject, by an
amount that shrinks like 1 / sqrt(K). Rates are printed with their Monte Carlo standard error sqrt(p (1 - p) / R).

    .venv/bin/python benchmarks/sim_jackknife_ar_finite_sample.py              # R = 2000 per K (a few minutes)
    .venv/bin/python benchmarks/sim_jackknife_ar_finite_sample.py --reps 500   # quicker
    .venv/bin/python benchmarks/sim_jackknife_ar_finite_sample.py --cases 40 --ks 50 100   # bigger clerks
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd
from scipy import stats

from ivdossier.estimation.many_instruments import decision_maker_anderson_rubin

BETA = 0.5
CASES_PER_CLERK = 10


def projection(n_dm: int, m: int) -> np.ndarray:
    """P for K = n_dm - 1 clerk dummies of m cases each after partialling the intercept: [same clerk]/m - 1/n."""
    n = n_dm * m
    dm = np.repeat(np.arange(n_dm), m)
    return (dm[:, None] == dm[None, :]) / m - 1.0 / n


def oracle(e: np.ndarray, s: np.ndarray, dm: np.ndarray, n_dm: int) -> tuple[float, float, float]:
    """(oracle statistic, the implementation's numerator, the exact variance of the numerator) for errors e
    with variances s: the numerator with the true errors over its exact standard deviation (grouped sums); the
    implementation partials the intercept out of e first, which leaves e'Pe unchanged (P annihilates it) but
    changes the removed diagonal."""
    n, m = e.size, e.size // n_dm
    sg, s2g = np.bincount(dm, weights=e, minlength=n_dm), np.bincount(dm, weights=e * e, minlength=n_dm)
    num = np.sum(sg * sg - s2g) / m - (e.sum() ** 2 - np.sum(e * e)) / n
    vg, v2g = np.bincount(dm, weights=s, minlength=n_dm), np.bincount(dm, weights=s * s, minlength=n_dm)
    within = np.sum(vg * vg - v2g)  # sum over i != j in the same group of s_i s_j
    total = s.sum() ** 2 - np.sum(s * s)
    var = 2.0 * ((1.0 / m - 1.0 / n) ** 2 * within + (total - within) / n**2)
    ec = e - e.mean()
    p_diag = 1.0 / m - 1.0 / n
    num_impl = num + p_diag * np.sum(e * e) - p_diag * np.sum(ec * ec)
    return float(num / np.sqrt(var)), float(num_impl), float(var)


def exact_skewness(p: np.ndarray, s: np.ndarray) -> float:
    a = p - np.diag(np.diag(p))
    h = np.sqrt(s)
    b = h[:, None] * a * h[None, :]
    b2 = b @ b
    return float(8.0 * np.sum(b2 * b) / (2.0 * np.trace(b2)) ** 1.5)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=2000)
    ap.add_argument("--seed", type=int, default=20261)
    ap.add_argument("--ks", type=int, nargs="+", default=[50, 100, 200])
    ap.add_argument("--cases", type=int, default=CASES_PER_CLERK, help="cases per clerk")
    args = ap.parse_args()
    rng = np.random.default_rng(args.seed)
    z = stats.norm.ppf(0.95)
    r = args.reps
    print(
        f"{args.cases} cases per clerk, heteroskedastic errors, H0 true, {r} replicates per K; nominal 0.05"
    )
    print(
        f"{'K':>5}{'as implemented':>16}{'MC s.e.':>9}{'oracle var.':>13}{'MC s.e.':>9}"
        f"{'E[Phi^]/Phi':>13}{'skew (sim)':>12}{'skew (exact)':>14}{'Edgeworth':>11}"
    )
    t0 = time.perf_counter()
    for k in args.ks:
        n_dm = k + 1
        n = n_dm * args.cases
        dm = np.repeat(np.arange(n_dm), args.cases)
        s_design = 0.25 + 1.5 * rng.uniform(size=n)  # one draw of the variances for the exact skewness
        g = exact_skewness(projection(n_dm, args.cases), s_design) if n <= 2500 else float("nan")
        feasible, orc, ratio = np.empty(r), np.empty(r), np.empty(r)
        for rep in range(r):
            s = 0.25 + 1.5 * rng.uniform(size=n)  # heteroskedasticity as in sim_jackknife_ar_size.py
            e = np.sqrt(s) * rng.normal(size=n)
            x = rng.normal(size=n)
            df = pd.DataFrame({"clerk": dm, "video": x, "visits": BETA * x + e})
            ar = decision_maker_anderson_rubin(
                df, outcome="visits", treatment="video", decision_maker="clerk", beta0=BETA
            )
            feasible[rep] = ar.statistic
            orc[rep], num_impl, var = oracle(e, s, dm, n_dm)
            ratio[rep] = (num_impl / ar.statistic) ** 2 / var  # K Phi-hat over the exact variance
        p_f, p_o = float(np.mean(feasible > z)), float(np.mean(orc > z))
        se_f, se_o = np.sqrt(p_f * (1 - p_f) / r), np.sqrt(p_o * (1 - p_o) / r)
        edgeworth = float(stats.norm.sf(z - g * (z * z - 1) / 6.0))
        print(
            f"{k:>5}{p_f:>16.3f}{se_f:>9.3f}{p_o:>13.3f}{se_o:>9.3f}"
            f"{ratio.mean():>13.3f}{stats.skew(orc):>12.2f}{g:>14.2f}{edgeworth:>11.3f}"
        )
    print(f"elapsed {time.perf_counter() - t0:.1f} s")


if __name__ == "__main__":
    main()
