"""Size of the wild bootstrap tests with few clusters: rejection rates under the null with Monte Carlo error.

Prints figures; it is not a test. For 8, 20 and 50 clusters it simulates an IV design with cluster-level
shocks, heteroskedastic errors and unequal cluster sizes, tests the true H0 at 5 % with

* the analytic cluster-robust 2SLS t test (t(G - 1) reference),
* the wild restricted efficient bootstrap t test (Davidson and MacKinnon 2010),
* the wild bootstrap Anderson–Rubin test,

and prints the rejection rate (reject when p <= 0.05, the rule the confidence sets use) with its Monte Carlo
standard error sqrt(p (1 - p) / R). With 8 clusters the Rademacher draws are fully enumerated (256 sign
vectors); otherwise B random Rademacher draws. A rate within about two standard errors of 0.05 is consistent
with correct size.

    .venv/bin/python benchmarks/bench_fragility_size.py                       # R = 400 per design
    .venv/bin/python benchmarks/bench_fragility_size.py --reps 1000 --draws 399
"""

from __future__ import annotations

import argparse
import math
import time

import numpy as np
import pandas as pd
from scipy import stats

from ivdossier.estimation.fragility_data import fragility_data
from ivdossier.estimation.wild_bootstrap import wild_bootstrap

TRUE_EFFECT = 0.5


def simulate(rng: np.random.Generator, g: int, mean_size: int) -> pd.DataFrame:
    """Unequal cluster sizes, a cluster shock shared by the instrument's errors and the outcome's."""
    sizes = rng.integers(max(2, mean_size // 3), 2 * mean_size, g)
    cl = np.repeat(np.arange(g), sizes)
    n = cl.size
    z = rng.normal(size=n) + 0.5 * rng.normal(size=g)[cl]
    shock = rng.normal(size=g)[cl]
    u = (rng.normal(size=n) + shock) * (0.5 + np.abs(z))
    x = 0.5 * z + 0.6 * u + rng.normal(size=n)
    y = TRUE_EFFECT * x + u
    return pd.DataFrame({"y": y, "x": x, "z": z, "cl": cl})


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--reps", type=int, default=400)
    ap.add_argument("--draws", type=int, default=199)
    ap.add_argument("--size", type=int, default=30, help="mean rows per cluster")
    ap.add_argument("--seed", type=int, default=2026)
    args = ap.parse_args()
    rng = np.random.default_rng(args.seed)
    print(
        f"R = {args.reps} replications per design, B = {args.draws} draws (enumeration when G <= 12), level 5 %"
    )
    print(f"{'G':>4} {'test':<28} {'rejection':>9} {'MC se':>7}")
    for g in (8, 20, 50):
        start = time.perf_counter()
        hits = {"analytic t (t(G-1))": 0, "wild bootstrap t (WRE)": 0, "wild bootstrap AR": 0}
        for _ in range(args.reps):
            frame = simulate(rng, g, args.size)
            fd = fragility_data(frame, outcome="y", treatment="x", instruments="z", cluster="cl")
            res = wild_bootstrap(fd, null=TRUE_EFFECT, draws=args.draws, seed=rng, confidence_sets=False)
            assert res.t_test is not None and res.anderson_rubin is not None
            t_abs = res.t_test.statistic
            hits["analytic t (t(G-1))"] += int(2 * stats.t.sf(t_abs, g - 1) < 0.05)
            hits["wild bootstrap t (WRE)"] += int(res.t_test.p_value <= 0.05)
            hits["wild bootstrap AR"] += int(res.anderson_rubin.p_value <= 0.05)
        for name, k in hits.items():
            p = k / args.reps
            print(f"{g:>4} {name:<28} {p:>9.3f} {math.sqrt(p * (1 - p) / args.reps):>7.3f}")
        print(f"     ({time.perf_counter() - start:.1f} s)")


if __name__ == "__main__":
    main()
