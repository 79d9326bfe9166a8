"""Monte Carlo size of the jackknife Anderson-Rubin test with many weak instruments, against the 2SLS t-test.

Prints figures; it is not a test. Invented decision-maker design: K + 1 clerks with about 10 cases each (so the
instruments are K clerk dummies, K = 50, 100, 200), a weak first stage (concentration parameter mu^2 = 2 sqrt(K),
the many-weak regime of Mikusheva and Sun 2022, and a less weak one, mu^2 = K), strong endogeneity (corr(e, v) = 0.8) and heteroskedastic
errors. H0 is true in every replicate; a valid 5% test rejects about 5% of the time. Under H0 the jackknife AR
statistic does not involve the first stage, so the two rows of one K are independent replications of its size,
and a third line per K pools them (2R replicates). Each rate is printed with its Monte Carlo standard error
sqrt(p (1 - p) / R). Why the jackknife AR sits above 5% at K = 50 (a right-skewed numerator and the noise of the
estimated variance, not an implementation error): benchmarks/sim_jackknife_ar_finite_sample.py.

    .venv/bin/python benchmarks/sim_jackknife_ar_size.py              # R = 3000 per row, 6000 pooled (a few minutes)
    .venv/bin/python benchmarks/sim_jackknife_ar_size.py --reps 300   # quicker
    .venv/bin/python benchmarks/sim_jackknife_ar_size.py --cases 40   # 40 cases per clerk (larger n, slower)
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd
from scipy import stats

from ivdossier.estimation.jackknife_iv import decision_maker_jackknife_iv
from ivdossier.estimation.many_instruments import decision_maker_anderson_rubin

BETA = 0.5
RHO = 0.8
CASES_PER_CLERK = 10


def replicate(rng: np.random.Generator, k: int, mu2: float, cases: int = CASES_PER_CLERK) -> pd.DataFrame:
    n_dm = k + 1
    n = n_dm * cases
    dm = np.repeat(np.arange(n_dm), cases)
    pi = rng.normal(size=n_dm)
    pi = (pi - pi.mean()) / pi.std() * np.sqrt(mu2 / n)  # sum_i pi_g(i)^2 = mu^2 with unit first-stage noise
    e = rng.normal(size=n)
    v = RHO * e + np.sqrt(1 - RHO**2) * rng.normal(size=n)
    h = np.sqrt(0.25 + 1.5 * rng.uniform(size=n))  # heteroskedasticity, mean variance one
    x = pi[dm] + h * v
    y = BETA * x + h * e
    return pd.DataFrame({"clerk": dm, "video": x, "visits": y})


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=3000)
    ap.add_argument("--ks", type=int, nargs="+", default=[50, 100, 200])
    ap.add_argument("--cases", type=int, default=CASES_PER_CLERK, help="cases per clerk")
    ap.add_argument("--seed", type=int, default=20260)
    args = ap.parse_args()
    rng = np.random.default_rng(args.seed)
    z2 = stats.norm.ppf(0.975)
    print(f"true beta {BETA}, corr(e, v) {RHO}, {args.cases} cases per clerk, {args.reps} replicates per row")
    print(
        f"{'K':>5}{'n':>7}{'mu^2':>8}{'jackknife AR':>14}{'MC s.e.':>9}{'2SLS t-test':>13}{'MC s.e.':>9}{'mean F~':>9}"
    )
    t0 = time.perf_counter()
    pooled: dict[int, list[int]] = {}
    for k, mu2 in [(kk, m) for kk in args.ks for m in (2.0 * np.sqrt(kk), float(kk))]:
        rej_ar = rej_t = 0
        f_sum = 0.0
        for _ in range(args.reps):
            df = replicate(rng, k, mu2, args.cases)
            ar = decision_maker_anderson_rubin(
                df, outcome="visits", treatment="video", decision_maker="clerk", beta0=BETA
            )
            rej_ar += int(ar.reject)
            f_sum += ar.strength
            tsls = decision_maker_jackknife_iv(
                df, outcome="visits", treatment="video", decision_maker="clerk"
            )
            est = tsls.get("2sls")
            rej_t += int(abs(est.estimate - BETA) / est.std_error > z2)
        r = args.reps
        p_ar, p_t = rej_ar / r, rej_t / r
        se_ar, se_t = np.sqrt(p_ar * (1 - p_ar) / r), np.sqrt(p_t * (1 - p_t) / r)
        print(
            f"{k:>5}{(k + 1) * args.cases:>7}{mu2:>8.1f}{p_ar:>14.3f}{se_ar:>9.3f}{p_t:>13.3f}{se_t:>9.3f}"
            f"{f_sum / r:>9.2f}"
        )
        pooled.setdefault(k, []).append(rej_ar)
        if len(pooled[k]) == 2:
            rr = 2 * r
            pp = sum(pooled[k]) / rr
            print(
                f"{k:>5}{'':>7}{'pooled':>8}{pp:>14.3f}{np.sqrt(pp * (1 - pp) / rr):>9.3f}   ({rr} replicates)"
            )
    print(f"nominal level 0.05; elapsed {time.perf_counter() - t0:.1f} s")


if __name__ == "__main__":
    main()
