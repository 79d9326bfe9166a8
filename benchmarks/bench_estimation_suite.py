"""The full estimation and diagnostic suite against pyfixest, against a one-pass Gram floor, its peak memory,
and two absorbed factors of many levels against pyfixest.

Prints figures; it is not a test. Timings are interleaved (ours, reference, ours, reference, ...) and the
median of ``--rounds`` rounds is reported, so load from other processes on the machine hits both alike.

    .venv/bin/python benchmarks/bench_estimation_suite.py                       # n = 1e6, everything
    .venv/bin/python benchmarks/bench_estimation_suite.py --n 200000 --rounds 3 # quick look
    .venv/bin/python benchmarks/bench_estimation_suite.py --only fe             # the two-factor part only

Design (seeded, invented): n rows, 10 controls, 2 instruments, 1 endogenous regressor, 1,000 clusters.

* suite: ivdossier ``estimate`` (2SLS, cluster covariance, every diagnostic: first stage, effective F,
  Cragg–Donald, KP rk Wald and LM, Sanderson–Windmeijer where it applies, AR test and set, CLR test and set,
  tF, reduced form, Hansen J, control-function and Durbin endogeneity tests) against pyfixest ``feols`` IV
  with CRV1 errors plus its IV diagnostics (``IV_Diag``: first-stage F and effective F).
* floor: one Gram matrix of all 14 numeric columns over the rows, plus per-cluster sums of the 10 products
  of the 4 model columns (the least work any one-pass method must do), from the same DataFrame.
* memory: peak traced memory (tracemalloc; numpy registers its buffers) of ``estimate`` over the size of the
  numeric data (float64 columns plus int64 cluster codes).
* fe: two absorbed factors of ``--fe-levels`` levels each (100,000 by default), 2SLS with CRV1 on the first
  factor (nested, so its levels do not count in the small-sample factor) against pyfixest, with coefficient and
  standard-error agreement. Conventions: pyfixest's default small-sample correction for CRV1 with fixed effects
  nested in the cluster; the simulated factors have no singleton groups, so the rows used agree.
"""

from __future__ import annotations

import argparse
import gc
import statistics
import time
import tracemalloc
import warnings
from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd

from ivdossier.estimation import estimate

N_CONTROLS = 10
CONTROLS = [f"c{j}" for j in range(N_CONTROLS)]


def simulate(n: int, n_clusters: int, fe_levels: int, seed: int = 7) -> pd.DataFrame:
    """Seeded IV design with clustered errors (true effect 0.5), optionally two factors of many levels."""
    rng = np.random.default_rng(seed)
    cluster = rng.integers(0, n_clusters, n)
    shock = rng.normal(size=n_clusters)[cluster]
    controls = rng.normal(size=(n, N_CONTROLS))
    z = rng.normal(size=(n, 2))
    u = rng.normal(size=n) + shock
    x = z @ np.array([0.3, 0.2]) + controls[:, :3].sum(axis=1) * 0.1 + 0.5 * u + rng.normal(size=n)
    y = 0.5 * x + controls @ np.linspace(0.1, 1.0, N_CONTROLS) + u
    cols: dict[str, np.ndarray] = {"y": y, "x": x, "z1": z[:, 0], "z2": z[:, 1]}
    for j in range(N_CONTROLS):
        cols[f"c{j}"] = controls[:, j]
    cols["cluster"] = cluster
    if fe_levels:
        # every level appears n / fe_levels times, so no singleton groups (the two libraries treat them alike)
        fa = rng.permutation(np.arange(n) % fe_levels)
        fb = rng.permutation(np.arange(n) % fe_levels)
        cols["fe_a"], cols["fe_b"] = fa, fb
        effect = rng.normal(size=fe_levels)
        cols["x"] = cols["x"] + effect[fa]
        cols["y"] = cols["y"] + effect[fb]
    return pd.DataFrame(cols)


def interleaved(fns: dict[str, Callable[[], Any]], rounds: int) -> dict[str, float]:
    """Median wall time per function over ``rounds`` interleaved rounds (one warm-up call each first)."""
    times: dict[str, list[float]] = {k: [] for k in fns}
    for fn in fns.values():
        fn()
    for _ in range(rounds):
        for name, fn in fns.items():
            gc.collect()
            t0 = time.perf_counter()
            fn()
            times[name].append(time.perf_counter() - t0)
    return {k: statistics.median(v) for k, v in times.items()}


def peak_bytes(fn: Callable[[], Any]) -> int:
    gc.collect()
    tracemalloc.start()
    tracemalloc.reset_peak()
    fn()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak


def ours(df: pd.DataFrame) -> Any:
    return estimate(
        df,
        outcome="y",
        treatment="x",
        instruments=["z1", "z2"],
        controls=CONTROLS,
        cluster="cluster",
        vcov="clustered",
    )


def pyfixest_suite(df: pd.DataFrame) -> Any:
    import pyfixest as pf

    fit = pf.feols(f"y ~ {' + '.join(CONTROLS)} | 0 | x ~ z1 + z2", data=df, vcov={"CRV1": "cluster"})
    fit.IV_Diag()
    return fit


def gram_floor(df: pd.DataFrame) -> Any:
    """One pass of Gram work: the 14 x 14 cross-products and per-cluster sums of 10 products of 4 columns."""
    from ivdossier.estimation.linalg import one_blas_thread

    cols = ["y", "x", "z1", "z2", *CONTROLS]
    with one_blas_thread():
        a = df[cols].to_numpy(dtype=np.float64)
        gram = a.T @ a
        four = a[:, :4]
        ia, ib = np.triu_indices(4)
        codes = df["cluster"].to_numpy()
        sums = np.stack(
            [np.bincount(codes, weights=four[:, i] * four[:, j]) for i, j in zip(ia, ib, strict=True)]
        )
    return gram, sums


def run_suite(n: int, n_clusters: int, rounds: int) -> None:
    df = simulate(n, n_clusters, 0)
    numeric_bytes = n * (4 + N_CONTROLS) * 8 + n * 8
    print(f"rows {n:,}; controls {N_CONTROLS}; instruments 2; endogenous 1; clusters {n_clusters:,}")
    res = ours(df)
    ref = pyfixest_suite(df)
    b_ref, se_ref = float(ref.coef()["x"]), float(ref.se()["x"])
    print(f"  ivdossier coefficient {res.coef[0]:.10f} se {res.se[0]:.10f}")
    print(f"  pyfixest  coefficient {b_ref:.10f} se {se_ref:.10f}")
    print(f"  relative differences: coefficient {abs(res.coef[0] - b_ref) / abs(b_ref):.2e}, se "
          f"{abs(res.se[0] - se_ref) / se_ref:.2e}")  # fmt: skip
    t = interleaved(
        {"ours": lambda: ours(df), "pyfixest": lambda: pyfixest_suite(df), "floor": lambda: gram_floor(df)},
        rounds,
    )
    print(f"  median of {rounds} interleaved rounds: ivdossier {t['ours']:.3f} s, pyfixest IV + IV_Diag "
          f"{t['pyfixest']:.3f} s, Gram floor {t['floor']:.3f} s")  # fmt: skip
    print(f"  pyfixest / ivdossier = {t['pyfixest'] / t['ours']:.2f}x (target >= 8x)")
    print(f"  ivdossier / Gram floor = {t['ours'] / t['floor']:.2f}x (target <= 2x)")
    peak = peak_bytes(lambda: ours(df))
    print(f"  peak traced memory {peak / 2**20:,.1f} MiB = {peak / numeric_bytes:.2f} x numeric data "
          f"({numeric_bytes / 2**20:,.1f} MiB; target < 1.5x)")  # fmt: skip


def run_fe(n: int, n_clusters: int, levels: int, rounds: int) -> None:
    import pyfixest as pf

    df = simulate(n, n_clusters, levels)
    print(f"rows {n:,}; two absorbed factors of {levels:,} levels; CRV1 on the first factor")

    def mine() -> Any:
        return estimate(
            df,
            outcome="y",
            treatment="x",
            instruments=["z1", "z2"],
            controls=CONTROLS,
            absorb=["fe_a", "fe_b"],
            cluster="fe_a",
            vcov="clustered",
        )

    def theirs() -> Any:
        return pf.feols(
            f"y ~ {' + '.join(CONTROLS)} | fe_a + fe_b | x ~ z1 + z2",
            data=df,
            vcov={"CRV1": "fe_a"},
            fixef_rm="none",
        )

    res, ref = mine(), theirs()
    b_ref, se_ref = float(ref.coef()["x"]), float(ref.se()["x"])
    print(f"  ivdossier coefficient {res.coef[0]:.10f} se {res.se[0]:.10f}; absorbed df {res.n_absorbed:,} "
          f"({res.n_absorbed_nested:,} nested in the cluster)")  # fmt: skip
    print(f"  pyfixest  coefficient {b_ref:.10f} se {se_ref:.10f}")
    print(f"  relative differences: coefficient {abs(res.coef[0] - b_ref) / abs(b_ref):.2e}, se "
          f"{abs(res.se[0] - se_ref) / se_ref:.2e}")  # fmt: skip
    df_c = res.n - len(res.names) - (res.n_partialled - res.n_absorbed_nested)
    print(f"  one more counted parameter in the CRV1 factor would change our se by "
          f"{np.sqrt(df_c / (df_c - 1)) - 1:.2e} (df {df_c:,} = n - treatments - controls - absorbed levels not "
          "nested in the cluster)")  # fmt: skip
    t = interleaved({"ours": mine, "pyfixest": theirs}, rounds)
    print(f"  median of {rounds} interleaved rounds: ivdossier {t['ours']:.3f} s (with every diagnostic), "
          f"pyfixest {t['pyfixest']:.3f} s (coefficients and CRV1 only)")  # fmt: skip
    print(f"  pyfixest / ivdossier = {t['pyfixest'] / t['ours']:.2f}x (target >= 3x)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--n", type=int, default=1_000_000)
    parser.add_argument("--clusters", type=int, default=1_000)
    parser.add_argument("--fe-levels", type=int, default=100_000)
    parser.add_argument("--rounds", type=int, default=5)
    parser.add_argument("--only", choices=["suite", "fe"], default=None)
    args = parser.parse_args()
    warnings.simplefilter("ignore")  # pyfixest deprecation and singleton notes would drown the figures
    if args.only in (None, "suite"):
        run_suite(args.n, args.clusters, args.rounds)
    if args.only in (None, "fe"):
        run_fe(args.n, args.clusters, args.fe_levels, args.rounds)


if __name__ == "__main__":
    main()
