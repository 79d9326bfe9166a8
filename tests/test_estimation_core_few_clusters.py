"""With no more clusters than instruments the coefficients still come back; the diagnostics say why they are absent."""

from __future__ import annotations

import numpy as np
import pandas as pd

from ivdossier.estimation import estimate


def test_too_few_clusters_for_the_diagnostics_still_returns_the_estimate() -> None:
    rng = np.random.default_rng(5)
    n = 400
    frame = pd.DataFrame({"z1": rng.normal(size=n), "z2": rng.normal(size=n), "g": rng.integers(0, 2, n)})
    frame["x"] = frame.z1 + frame.z2 + rng.normal(size=n)
    frame["y"] = 0.5 * frame.x + rng.normal(size=n)
    res = estimate(frame, outcome="y", treatment="x", instruments=["z1", "z2"], cluster="g", vcov="cluster")
    out = res.to_dict()
    assert np.isfinite(out["coef"]["x"])
    assert "instrument diagnostics not computed" in out["strength"]["reason"]
