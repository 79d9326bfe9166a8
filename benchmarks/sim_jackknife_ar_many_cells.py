"""Monte Carlo size of the jackknife Anderson-Rubin test when many small cells are partialled out.

Prints figures; it is not a test. Invented decision-maker design: clerks nested in cells (e.g. clinic-by-week rotas),
each cell absorbed as a fixed effect, homoskedastic normal errors plus a cell effect, H0 true. Mikusheva and Sun
(2022) partial out a fixed number of controls; with many small cells the partialled errors are no longer
independent and the numerator's centre moves by sum_i P_ii (P_W)_ii (an exact identity for homoskedastic errors),
which the module reports, in standard deviations of the numerator, as the shift. The test is run with the limit
lifted (max_shift = inf) so the rate it would have is visible beside the shift; with the default limit
(``MAX_SHIFT``) the rows whose shift exceeds it are reported as not applicable. Rates carry their Monte Carlo
standard error sqrt(p (1 - p) / R); nominal level 0.05, one-sided.

    .venv/bin/python benchmarks/sim_jackknife_ar_many_cells.py              # R = 2000 per row (a few minutes)
    .venv/bin/python benchmarks/sim_jackknife_ar_many_cells.py --reps 300   # quicker
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd

from ivdossier.estimation.many_instruments import MAX_SHIFT, decision_maker_anderson_rubin

BETA = 0.5
LAYOUTS = [  # (cells, clerks per cell, cases per clerk)
    (1, 51, 10),
    (5, 11, 10),
    (10, 6, 10),
    (25, 3, 10),
    (50, 2, 10),
    (50, 2, 40),
    (100, 2, 5),
]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--reps", type=int, default=2000)
    ap.add_argument("--seed", type=int, default=20262)
    args = ap.parse_args()
    rng = np.random.default_rng(args.seed)
    r = args.reps
    print(
        f"homoskedastic normal errors plus a cell effect, H0 true, {r} replicates per row; default limit {MAX_SHIFT}"
    )
    print(
        f"{'cells':>6}{'clerks/cell':>12}{'cases/clerk':>12}{'K':>5}{'n':>6}{'shift':>8}{'rate':>8}{'MC s.e.':>9}  default"
    )
    t0 = time.perf_counter()
    for n_cells, per_cell, per_dm in LAYOUTS:
        dm = np.repeat(np.arange(n_cells * per_cell), per_dm)
        cell = dm // per_cell
        n = dm.size
        rej, shift_ok = 0, True
        for _ in range(r):
            x = rng.normal(size=n)
            e = rng.normal(size=n) + rng.normal(size=n_cells)[cell]
            df = pd.DataFrame({"clerk": dm, "cell": cell, "video": x, "visits": BETA * x + e})
            kw = dict(outcome="visits", treatment="video", decision_maker="clerk", beta0=BETA)
            res = decision_maker_anderson_rubin(df, absorb="cell", max_shift=np.inf, **kw)  # type: ignore[arg-type]
            rej += int(res.reject)
        default = decision_maker_anderson_rubin(df, absorb="cell", **kw)  # type: ignore[arg-type]
        shift_ok = default.applicable
        k = n_cells * (per_cell - 1)
        p_diag = 1.0 / per_dm - 1.0 / (per_cell * per_dm)
        shift = n_cells * (per_cell - 1) / (per_cell * per_dm) / np.sqrt(2.0 * (k - n * p_diag**2))
        p = rej / r
        print(
            f"{n_cells:>6}{per_cell:>12}{per_dm:>12}{k:>5}{n:>6}{shift:>8.3f}{p:>8.3f}{np.sqrt(p * (1 - p) / r):>9.3f}"
            f"  {'applicable' if shift_ok else 'not applicable'}"
        )
    print(f"elapsed {time.perf_counter() - t0:.1f} s")


if __name__ == "__main__":
    main()
