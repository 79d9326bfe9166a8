"""Speed and memory of ivdossier's estimate() against linearmodels on a large simulated IV model.

Prints figures; it is not a test. Default: n = 1,000,000 rows, 10 controls, 2 instruments, 1 endogenous
regressor, 1,000 clusters; ivdossier's full estimate (2SLS, cluster covariance, every weak-instrument
diagnostic) against linearmodels IV2SLS(...).fit(cov_type="clustered") plus its first_stage diagnostics.

    .venv/bin/python benchmarks/bench_estimation.py                 # n = 1e6
    .venv/bin/python benchmarks/bench_estimation.py --n 10000000    # n = 1e7 (reference skipped if RAM is short)
    .venv/bin/python benchmarks/bench_estimation.py --two-way-fe    # also absorb two FEs, 100,000 levels each

Multithreaded OpenBLAS can be much slower on tall-and-skinny products on small machines; run once more with
OPENBLAS_NUM_THREADS=1 in the environment to see both libraries without that effect.

Peak memory is measured with tracemalloc (numpy registers its allocations there) in a separate run, and
reported relative to the size of the numeric data (float64 columns plus int64 cluster codes).
"""

from __future__ import annotations

import argparse
import gc
import os
import time
import tracemalloc
from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd

from ivdossier.estimation import estimate

N_CONTROLS = 10
# peak traced memory of the linearmodels reference relative to the numeric data, measured at n = 1e6
REFERENCE_MEMORY_FACTOR = 41


def simulate(n: int, n_clusters: int, fe_levels: int, seed: int = 1) -> pd.DataFrame:
    """Seeded IV design with clustered errors (true effect 0.5)."""
    rng = np.random.default_rng(seed)
    cluster = rng.integers(0, n_clusters, n)
    shock = rng.normal(size=n_clusters)[cluster]
    cols: dict[str, np.ndarray] = {}
    controls = rng.normal(size=(n, N_CONTROLS))
    z = rng.normal(size=(n, 2))
    u = rng.normal(size=n) + shock
    x = z @ np.array([0.3, 0.2]) + controls[:, :3].sum(axis=1) * 0.1 + 0.5 * u + rng.normal(size=n)
    y = 0.5 * x + controls @ np.linspace(0.1, 1.0, N_CONTROLS) + u
    cols["y"] = y
    cols["x"] = x
    cols["z1"], cols["z2"] = z[:, 0], z[:, 1]
    for j in range(N_CONTROLS):
        cols[f"c{j}"] = controls[:, j]
    cols["cluster"] = cluster
    if fe_levels:
        cols["fe_a"] = rng.integers(0, fe_levels, n)
        cols["fe_b"] = rng.integers(0, fe_levels, n)
    return pd.DataFrame(cols)


def timed(fn: Callable[[], Any], repeat: int) -> tuple[float, Any]:
    best = float("inf")
    out = None
    for _ in range(repeat):
        gc.collect()
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def peak_bytes(fn: Callable[[], Any]) -> int:
    gc.collect()
    tracemalloc.start()
    tracemalloc.reset_peak()
    fn()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--n", type=int, default=1_000_000, help="rows (default 1,000,000)")
    parser.add_argument("--clusters", type=int, default=1_000, help="number of clusters (default 1,000)")
    parser.add_argument("--two-way-fe", action="store_true", help="also time absorbing two FEs")
    parser.add_argument("--fe-levels", type=int, default=100_000, help="levels per FE for --two-way-fe")
    parser.add_argument("--repeat", type=int, default=2, help="timing repetitions (best is reported)")
    parser.add_argument("--skip-reference", action="store_true", help="do not run linearmodels")
    args = parser.parse_args()

    df = simulate(args.n, args.clusters, args.fe_levels if args.two_way_fe else 0)
    controls = [f"c{j}" for j in range(N_CONTROLS)]
    numeric_bytes = args.n * (4 + N_CONTROLS) * 8 + args.n * 8  # y, x, z1, z2, controls + cluster codes
    print(f"rows {args.n:,}; controls {N_CONTROLS}; instruments 2; endogenous 1; clusters {args.clusters:,}")
    print(f"numeric data size {numeric_bytes / 2**20:,.1f} MiB")

    def ours() -> Any:
        return estimate(
            df,
            outcome="y",
            treatment="x",
            instruments=["z1", "z2"],
            controls=controls,
            cluster="cluster",
            vcov="clustered",
        )

    t_ours, res = timed(ours, args.repeat)
    has_diag = res.diagnostics is not None
    print(f"ivdossier estimate (2SLS, cluster, diagnostics={'yes' if has_diag else 'no'}): {t_ours:.3f} s")
    print(f"  coefficient {res.coef[0]:.6f} (se {res.se[0]:.6f})")
    p_ours = peak_bytes(ours)
    print(f"  peak traced memory {p_ours / 2**20:,.1f} MiB = {p_ours / numeric_bytes:.2f} x numeric data")

    total_ram = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    if not args.skip_reference and REFERENCE_MEMORY_FACTOR * numeric_bytes > total_ram:
        print(
            f"linearmodels skipped: at about {REFERENCE_MEMORY_FACTOR}x the numeric data it would need "
            f"{REFERENCE_MEMORY_FACTOR * numeric_bytes / 2**30:,.0f} GiB, more than the {total_ram / 2**30:,.0f} "
            "GiB of this machine"
        )
        args.skip_reference = True
    if not args.skip_reference:
        from linearmodels.iv import IV2SLS

        def reference() -> Any:
            exog = pd.concat([pd.Series(1.0, index=df.index, name="const"), df[controls]], axis=1)
            fit: Any = IV2SLS(df["y"], exog, df["x"], df[["z1", "z2"]]).fit(
                cov_type="clustered", clusters=df["cluster"].to_numpy(), debiased=True
            )
            diag = fit.first_stage.diagnostics
            return fit, diag

        t_ref, (ref, _) = timed(reference, args.repeat)
        print(f"linearmodels IV2SLS clustered + first_stage diagnostics: {t_ref:.3f} s")
        print(f"  coefficient {float(ref.params['x']):.6f} (se {float(ref.std_errors['x']):.6f})")
        print(f"  time ratio ivdossier / linearmodels = {t_ours / t_ref:.3f}")
        p_ref = peak_bytes(reference)
        print(f"  peak traced memory {p_ref / 2**20:,.1f} MiB = {p_ref / numeric_bytes:.2f} x numeric data")
        rel = abs(res.coef[0] - float(ref.params["x"])) / abs(float(ref.params["x"]))
        print(f"  relative coefficient difference {rel:.2e}")

    if args.two_way_fe:

        def two_way() -> Any:
            return estimate(
                df,
                outcome="y",
                treatment="x",
                instruments=["z1", "z2"],
                controls=controls,
                absorb=["fe_a", "fe_b"],
                cluster="cluster",
                vcov="clustered",
            )

        t_fe, res_fe = timed(two_way, 1)
        print(
            f"ivdossier with two absorbed FEs ({args.fe_levels:,} levels each): {t_fe:.3f} s, "
            f"absorbed df {res_fe.n_absorbed:,}, coefficient {res_fe.coef[0]:.6f}"
        )


if __name__ == "__main__":
    main()
