"""Speed of the fragility diagnostics: wild bootstrap, pairs bootstrap and leave-one-cluster-out influence.

Prints figures; it is not a test. Target: 9,999 wild-bootstrap draws at n = 1,000,000 rows and G = 1,000
clusters in under 10 s on two cores (the t test and the Anderson–Rubin test of one null; the confidence sets,
which invert the tests over many nulls, are timed separately).

Reference ratio: the Anderson–Rubin wild bootstrap is a restricted wild cluster bootstrap of the OLS regression
of y - b0 x on the instruments and controls, which the `wildboottest` package computes as well. Both are timed
on the same data, interleaved (ours, theirs, ours, theirs ...), median of the rounds; the reference runs only
with at most 200 clusters (its cost grows with the square of G in Python loops).

    .venv/bin/python benchmarks/bench_fragility_speed.py                  # n = 1e6, G = 1000, B = 9999
    .venv/bin/python benchmarks/bench_fragility_speed.py --n 200000 --rounds 5
"""

from __future__ import annotations

import argparse
import statistics
import time
from collections.abc import Callable

import numpy as np
import pandas as pd

from ivdossier.estimation.fragility_data import fragility_data
from ivdossier.estimation.influence import jackknife_influence
from ivdossier.estimation.pairs_bootstrap import pairs_bootstrap
from ivdossier.estimation.wild_bootstrap import wild_bootstrap


def simulate(n: int, g: int, seed: int = 1) -> pd.DataFrame:
    """Seeded clustered IV design with two controls (true effect 0.5)."""
    rng = np.random.default_rng(seed)
    cl = rng.integers(0, g, n)
    c = rng.normal(size=(n, 2))
    z = rng.normal(size=n) + 0.3 * rng.normal(size=g)[cl]
    u = rng.normal(size=n) + rng.normal(size=g)[cl]
    x = 0.4 * z + 0.5 * u + rng.normal(size=n) + c @ [0.2, 0.1]
    y = 0.5 * x + u + c @ [0.3, -0.2]
    return pd.DataFrame({"y": y, "x": x, "z": z, "c1": c[:, 0], "c2": c[:, 1], "cl": cl})


def timed(fn: Callable[[], object]) -> float:
    start = time.perf_counter()
    fn()
    return time.perf_counter() - start


def run_wildboottest(frame: pd.DataFrame, b0: float, draws: int) -> None:
    from wildboottest.wildboottest import WildboottestCL

    xmat = np.column_stack([frame.z, np.ones(len(frame)), frame.c1, frame.c2])
    wb = WildboottestCL(
        X=xmat,
        Y=(frame.y - b0 * frame.x).to_numpy(),
        cluster=frame.cl.to_numpy(),
        R=np.array([1.0, 0, 0, 0]),
        B=draws,
        seed=1,
    )
    wb.get_scores(bootstrap_type="11", impose_null=True)
    wb.get_weights(weights_type="rademacher")
    wb.get_numer()
    wb.get_denom()
    wb.get_tboot()
    wb.get_vcov()
    wb.get_tstat()
    wb.get_pvalue()


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--n", type=int, default=1_000_000)
    ap.add_argument("--clusters", type=int, default=1000)
    ap.add_argument("--draws", type=int, default=9999)
    ap.add_argument("--rounds", type=int, default=3)
    ap.add_argument("--skip-reference", action="store_true")
    args = ap.parse_args()
    frame = simulate(args.n, args.clusters)
    t0 = time.perf_counter()
    fd = fragility_data(
        frame, outcome="y", treatment="x", instruments="z", controls=["c1", "c2"], cluster="cl"
    )
    prep = time.perf_counter() - t0
    print(
        f"n = {args.n:,}, G = {args.clusters}, B = {args.draws}; data preparation (one partialling pass) {prep:.2f} s"
    )

    wild, ar_only, ref = [], [], []
    for r in range(args.rounds):
        wild.append(
            timed(lambda r=r: wild_bootstrap(fd, null=0.5, draws=args.draws, seed=r, confidence_sets=False))
        )
        ar_only.append(
            timed(
                lambda r=r: wild_bootstrap(
                    fd, null=0.5, draws=args.draws, seed=r, confidence_sets=False, tests=("ar",)
                )
            )
        )
        if not args.skip_reference and args.clusters <= 200:
            ref.append(timed(lambda: run_wildboottest(frame, 0.5, args.draws)))
    print(
        f"wild bootstrap, t and AR tests of one null: median {statistics.median(wild):.2f} s over {args.rounds} rounds"
    )
    print(f"wild bootstrap, AR test only:               median {statistics.median(ar_only):.2f} s")
    if not ref:
        print(
            "(wildboottest reference skipped: it loops over pairs of clusters in Python; run with --clusters 200)"
        )
    if ref:
        m_ref = statistics.median(ref)
        print(
            f"wildboottest, same AR bootstrap (WCR):      median {m_ref:.2f} s; ratio reference / ours "
            f"{m_ref / statistics.median(ar_only):.1f}"
        )
    sets = timed(lambda: wild_bootstrap(fd, null=0.5, draws=args.draws, seed=1))
    print(f"wild bootstrap with both confidence sets:   {sets:.2f} s (one round)")
    print(
        f"pairs bootstrap, 999 draws:                 {timed(lambda: pairs_bootstrap(fd, draws=999, seed=1)):.2f} s"
    )
    print(
        f"leave-one-cluster-out, {args.clusters} deletions:     {timed(lambda: jackknife_influence(fd)):.2f} s"
    )


if __name__ == "__main__":
    main()
