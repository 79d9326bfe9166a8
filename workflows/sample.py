"""Sample dossier inputs whose results come from the real producers (an estimate on invented data).

Tests and the benchmark use these instead of hand-written result dicts, so a change in what the estimation layer
stores is seen by every document test. The data are simulated for the invented telehealth scenario.
"""

from __future__ import annotations

import dataclasses
from functools import lru_cache
from typing import Any

from ivdossier.estimation.result import EstimationResult
from ivdossier.reports.inputs import DossierInput, RunInfo
from ivdossier.reports.sample import make_run, sample_input


@lru_cache(maxsize=32)
def sample_frame(n: int = 400, seed: int = 7, strength: float = 0.6, districts: int = 40) -> Any:
    """Invented patient rows: telehealth use moved by the fibre wave and the clerk's video propensity, with
    unobserved frailty confounding telehealth and emergency visits (true effect -0.3)."""
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(seed)
    fibre, clerk, frailty, noise = rng.normal(size=(4, n))
    telehealth = strength * fibre + 0.4 * clerk + frailty + rng.normal(size=n)
    return pd.DataFrame(
        {
            "ed_visits": -0.3 * telehealth + frailty + noise,
            "telehealth": telehealth,
            "fibre_wave": fibre,
            "clerk_propensity": clerk,
            "district": rng.integers(0, districts, n),
        }
    )


@lru_cache(maxsize=32)
def sample_result(
    method: str = "2sls",
    *,
    instruments: tuple[str, ...] = ("fibre_wave", "clerk_propensity"),
    vcov: str = "heteroskedastic",
    n: int = 400,
    seed: int = 7,
    strength: float = 0.6,
    districts: int = 40,
) -> EstimationResult:
    """A real estimate on the sample frame (OLS takes no instruments)."""
    from ivdossier.estimation import estimate

    return estimate(
        sample_frame(n, seed, strength, districts),
        outcome="ed_visits",
        treatment="telehealth",
        instruments=() if method == "ols" else instruments,
        cluster="district" if vcov in ("clustered", "cluster") else None,
        method=method,
        vcov=vcov,
    )


def sample_run(i: int, result: EstimationResult | None = None, *, plots: bool = True) -> RunInfo:
    """Run number `i` carrying a real result, stored exactly as a registry run stores it."""
    from ivdossier.workflows.runs import stored_results

    res = result if result is not None else sample_result()
    run = make_run(i, method=res.method, results=stored_results(res), plots=plots)
    return dataclasses.replace(run, vcov=res.vcov, spec={**res.spec})


def sample_dossier_input(*, n_links: int = 4, n_runs: int = 2, graph_svg: str = "") -> DossierInput:
    """The sample dossier input with an OLS run and `n_runs - 1` instrumental-variable runs, all real."""
    runs = [sample_run(0, sample_result("ols"), plots=False)]
    runs += [sample_run(i, sample_result("2sls", seed=7 + i)) for i in range(1, n_runs)]
    base = sample_input(n_links=n_links, n_runs=1, graph_svg=graph_svg)
    return dataclasses.replace(base, runs=tuple(runs))
