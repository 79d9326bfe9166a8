"""Generated designs on which every kind of run other than an estimate is computed, so that the quantities a decision
rule may name are read from what each analysis really stores (its result type's ``to_dict()``), never written by
hand.

Each kind gets a design on which every part applies and, where one can be built, a design on which a part does not
apply (its fields are then empty or carry a reason), so that the listing says which quantities may be empty.
Only the paths matter, not the values; the designs are small and seeded so the probe takes a few seconds.
"""

from __future__ import annotations

import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

# Column names of the generated designs; chosen so that no key of the results can be mistaken for them.
PROBE_TREATMENT, PROBE_TREATMENT_2 = "probe_treatment_col", "probe_treatment_col_2"
PROBE_INSTRUMENTS = ("probe_instrument_a", "probe_instrument_b", "probe_instrument_c")


def _frame(n: int, groups: int, seed: int) -> Any:
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(seed)
    a, b, c, u = (rng.normal(size=n) for _ in range(4))
    x, x2 = a + 0.5 * b + u + rng.normal(size=n), b + c + rng.normal(size=n)
    return pd.DataFrame({"y": x + x2 + u, PROBE_TREATMENT: x, PROBE_TREATMENT_2: x2, PROBE_INSTRUMENTS[0]: a,
                         PROBE_INSTRUMENTS[1]: b, PROBE_INSTRUMENTS[2]: c, "w": rng.normal(size=n),
                         "w2": rng.normal(size=n), "g": np.arange(n) % groups})  # fmt: skip


def _one(**extra: Any) -> Any:
    from ivdossier.estimation.spec import ModelSpec

    keywords: dict[str, Any] = {"outcome": "y", "treatment": PROBE_TREATMENT,
                                "instruments": PROBE_INSTRUMENTS[0], "controls": "w"}  # fmt: skip
    return ModelSpec.build(**{**keywords, **extra})


def _compute(name: str, frame: Any, spec: Any, options: dict[str, Any]) -> dict[str, Any]:
    from ivdossier.workflows.analyses import analysis

    compute = analysis(name).compute
    assert compute is not None
    result, _ = compute(frame, spec, options)
    return dict(result.to_dict())


def _bootstrap() -> list[dict[str, Any]]:
    clustered = _one(cluster="g", vcov="clustered")
    return [
        _compute("fragility bootstrap", _frame(120, 10, 1), clustered, {"draws": 99, "pairs_draws": 19}),
        _compute("fragility bootstrap", _frame(120, 10, 2), clustered, {"draws": 99}),  # no pairs bootstrap
        _compute("fragility bootstrap", _frame(60, 2, 3), clustered, {"draws": 9, "pairs_draws": 9}),
    ]


def _influence() -> list[dict[str, Any]]:
    return [
        _compute("fragility influence", _frame(120, 10, 4), _one(cluster="g", vcov="clustered"), {}),
        _compute(
            "fragility influence", _frame(60, 2, 5), _one(cluster="g", vcov="clustered"), {}
        ),  # 2 clusters
    ]


def _subvector() -> list[dict[str, Any]]:
    spec = _one(treatment=[PROBE_TREATMENT, PROBE_TREATMENT_2], instruments=list(PROBE_INSTRUMENTS))
    homoskedastic = _one(treatment=[PROBE_TREATMENT, PROBE_TREATMENT_2], instruments=list(PROBE_INSTRUMENTS),
                         vcov="homoskedastic")  # fmt: skip
    return [
        _compute("fragility subvector", _frame(150, 10, 6), spec, {"of": PROBE_TREATMENT}),
        _compute("fragility subvector", _frame(150, 10, 7), homoskedastic, {"of": PROBE_TREATMENT}),
    ]


def _confounder() -> list[dict[str, Any]]:
    spec = _one(controls=["w", "w2"])
    return [
        _compute("confounder-strength", _frame(200, 10, 8), spec, {"benchmarks": ["w"], "k": [1.0, 2.0]}),
        _compute("confounder-strength", _frame(200, 10, 9), spec, {}),
    ]


def _decision_makers() -> list[dict[str, Any]]:
    import numpy as np
    import pandas as pd

    out = []
    for seed, judges, n in ((10, 12, 240), (11, 30, 150)):  # the second flags every clerk as small
        rng = np.random.default_rng(seed)
        dm = np.arange(n) % judges
        x = (rng.uniform(size=n) < rng.uniform(0.2, 0.8, judges)[dm]).astype(float)
        frame = pd.DataFrame(
            {"y": x + rng.normal(size=n), PROBE_TREATMENT: x, "clerk": [f"c{d}" for d in dm]}
        )
        options = {"outcome": "y", "treatment": PROBE_TREATMENT, "decision_maker": "clerk", "min_cases": 5}
        out.append(_compute("design decision-makers", frame, None, options))
    return out


def _exposure_share() -> list[dict[str, Any]]:
    import numpy as np
    import pandas as pd

    out = []
    for seed, n_units, n_sectors in ((12, 40, 5), (13, 6, 8)):  # the second has more sectors than units
        rng = np.random.default_rng(seed)
        units, sectors = [f"u{i}" for i in range(n_units)], [f"s{k}" for k in range(n_sectors)]
        shares = rng.dirichlet(np.ones(n_sectors), size=n_units) * 0.9
        shocks = rng.normal(size=n_sectors)
        x = shares @ shocks + rng.normal(size=n_units)
        long = pd.DataFrame([(u, s, shares[i, k]) for i, u in enumerate(units) for k, s in enumerate(sectors)],
                            columns=["unit", "sector", "share"])  # fmt: skip
        data = pd.DataFrame({"unit": units, "y": x + rng.normal(size=n_units), PROBE_TREATMENT: x})
        with tempfile.TemporaryDirectory() as folder:
            long.to_csv(Path(folder) / "shares.csv", index=False)
            pd.DataFrame({"sector": sectors, "shock": shocks}).to_csv(
                Path(folder) / "shocks.csv", index=False
            )
            options = {"outcome": "y", "treatment": PROBE_TREATMENT, "shares": str(Path(folder) / "shares.csv"),
                       "shocks": str(Path(folder) / "shocks.csv")}  # fmt: skip
            out.append(_compute("design exposure-share", data, None, options))
    return out


def _variants() -> list[dict[str, Any]]:
    import numpy as np
    import pandas as pd

    out = []
    for seed, k, sizes in ((14, 8, True), (15, 2, False)):  # two variants: no Egger, median or leave-one-out
        rng = np.random.default_rng(seed)
        bx = rng.uniform(0.05, 0.2, k)
        frame = pd.DataFrame({"variant": [f"rs{i}" for i in range(k)], "exposure_effect": bx,
                              "exposure_se": np.full(k, 0.01), "outcome_effect": 0.3 * bx + rng.normal(0, 0.01, k),
                              "outcome_se": np.full(k, 0.01)})  # fmt: skip
        if sizes:
            frame = frame.assign(exposure_n=10_000, outcome_n=20_000)
        out.append(_compute("variants", frame, None, {"draws": 50}))
    return out


#: The designs of each run kind a decision rule may read besides an estimate.
PROBES: dict[str, Callable[[], list[dict[str, Any]]]] = {
    "fragility-bootstrap": _bootstrap,
    "fragility-influence": _influence,
    "fragility-subvector": _subvector,
    "design-decision-makers": _decision_makers,
    "design-exposure-share": _exposure_share,
    "variants": _variants,
    "confounder-strength": _confounder,
}
