"""Speed of the decision-maker propensity (leave-one-out and leave-own-cluster-out) on a million cases.

Prints figures; it is not a test. Default: 1,000,000 cases, 5,000 decision-makers (string ids), 20,000 case
clusters. ivdossier's decision_maker_propensity (full path: validation, factorising the ids, one grouped pass)
against a pandas groupby-transform computation of the same leave-one-out mean, interleaved A B A B, median of
several rounds. The target of issue 17 is under 2 s for the leave-one-out construction.

    .venv/bin/python benchmarks/bench_leave_out.py
    .venv/bin/python benchmarks/bench_leave_out.py --n 2000000 --decision-makers 10000
"""

from __future__ import annotations

import argparse
import statistics
import time

import numpy as np
import pandas as pd

from ivdossier.estimation.leave_out import decision_maker_propensity


def simulate(n: int, n_dm: int, n_clusters: int, seed: int = 3) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    dm = rng.integers(0, n_dm, n)
    rate = rng.uniform(0.2, 0.8, n_dm)[dm]
    ids = np.array([f"clerk-{k:05d}" for k in range(n_dm)], dtype=object)
    return pd.DataFrame(
        {
            "clerk": ids[dm],
            "video": (rng.uniform(size=n) < rate).astype(np.float64),
            "clinic": rng.integers(0, n_clusters, n),
        }
    )


def pandas_reference(df: pd.DataFrame) -> np.ndarray:
    grouped = df.groupby("clerk", sort=False)["video"]
    sums = grouped.transform("sum").to_numpy()
    counts = grouped.transform("count").to_numpy()
    return np.asarray((sums - df["video"].to_numpy()) / (counts - 1))


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1_000_000)
    ap.add_argument("--decision-makers", type=int, default=5_000)
    ap.add_argument("--clusters", type=int, default=20_000)
    ap.add_argument("--rounds", type=int, default=5)
    args = ap.parse_args()
    df = simulate(args.n, args.decision_makers, args.clusters)
    print(f"cases {args.n:,}, decision-makers {args.decision_makers:,}, clusters {args.clusters:,}")
    ours, ref, ours_cl = [], [], []
    check = None
    for _ in range(args.rounds):
        t0 = time.perf_counter()
        res = decision_maker_propensity(df, decision_maker="clerk", treatment="video")
        ours.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        check = pandas_reference(df)
        ref.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        decision_maker_propensity(
            df, decision_maker="clerk", treatment="video", leave_out="cluster", cluster="clinic"
        )
        ours_cl.append(time.perf_counter() - t0)
    assert check is not None
    diff = float(np.max(np.abs(res.values - check)))
    m_ours, m_ref, m_cl = statistics.median(ours), statistics.median(ref), statistics.median(ours_cl)
    print(f"leave-one-out, ivdossier (median of {args.rounds}): {m_ours:.3f} s   target < 2 s")
    print(f"leave-one-out, pandas groupby-transform:        {m_ref:.3f} s   ratio {m_ours / m_ref:.2f}")
    print(f"leave-own-cluster-out, ivdossier:               {m_cl:.3f} s")
    print(f"largest difference from the pandas reference: {diff:.2e}")


if __name__ == "__main__":
    main()
