"""Time of the grouped decision-maker paths (2SLS/JIVE1/UJIVE and the jackknife AR) at judge-design scale.

Prints figures; it is not a test. Default: 1,000,000 cases, 5,000 decision-makers (clerks) nested in 50
scheduling cells, and the same without cells (one cell of 5,000 clerks, the AR path's worst case: it costs about
the sum over cells of the squared number of decision-makers). Median of several rounds. There is no reference
library for these estimators to time against; the dense path (explicit dummies) is timed on a 5,000-case
subsample for scale.

    .venv/bin/python benchmarks/bench_decision_maker_paths.py
"""

from __future__ import annotations

import argparse
import statistics
import time
from collections.abc import Callable

import numpy as np
import pandas as pd

from ivdossier.estimation.jackknife_iv import decision_maker_jackknife_iv, jackknife_iv
from ivdossier.estimation.many_instruments import decision_maker_anderson_rubin, jackknife_anderson_rubin


def simulate(n: int, n_dm: int, n_cells: int, seed: int = 4) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    dm = rng.integers(0, n_dm, n)
    u = rng.normal(size=n)
    x = (rng.uniform(size=n) + 0.1 * u < rng.uniform(0.2, 0.8, n_dm)[dm]).astype(float)
    y = -0.5 * x + u + rng.normal(size=n)
    return pd.DataFrame({"clerk": dm, "cell": dm % n_cells, "video": x, "visits": y})


def timed(fn: Callable[[], object], rounds: int) -> float:
    out = []
    for _ in range(rounds):
        t0 = time.perf_counter()
        fn()
        out.append(time.perf_counter() - t0)
    return statistics.median(out)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1_000_000)
    ap.add_argument("--decision-makers", type=int, default=5_000)
    ap.add_argument("--rounds", type=int, default=3)
    args = ap.parse_args()
    kw = {"outcome": "visits", "treatment": "video", "decision_maker": "clerk"}
    for cells in (50, 1):
        df = simulate(args.n, args.decision_makers, cells)
        absorb = "cell" if cells > 1 else None
        t_iv = timed(lambda d=df, a=absorb: decision_maker_jackknife_iv(d, absorb=a, **kw), args.rounds)
        t_ar = timed(lambda d=df, a=absorb: decision_maker_anderson_rubin(d, absorb=a, **kw), args.rounds)
        print(
            f"{args.n:,} cases, {args.decision_makers:,} clerks in {cells} cell(s): "
            f"2SLS/JIVE1/UJIVE {t_iv:.2f} s, jackknife AR with its confidence set {t_ar:.2f} s"
        )
    small = simulate(5_000, 250, 1)
    z = np.zeros((len(small), 250))
    z[np.arange(len(small)), small["clerk"].to_numpy()] = 1.0
    t_dense_iv = timed(lambda: jackknife_iv(small["visits"], small["video"], z[:, 1:]), args.rounds)
    t_dense_ar = timed(lambda: jackknife_anderson_rubin(small["visits"], small["video"], z), args.rounds)
    t_grp_ar = timed(lambda: decision_maker_anderson_rubin(small, **kw), args.rounds)
    print(
        f"5,000 cases, 250 clerks: dense jackknife IV {t_dense_iv:.2f} s, dense AR {t_dense_ar:.2f} s, "
        f"grouped AR {t_grp_ar:.3f} s"
    )


if __name__ == "__main__":
    main()
