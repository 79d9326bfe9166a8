"""The port of Brent's method returns exactly what scipy.optimize.brentq returns.

Reference: scipy.optimize.brentq itself (test-only). The port repeats scipy's C code operation by operation, so
the root, the points where f is evaluated and the errors must be the same, compared with == (not a tolerance).
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd
import pytest
from scipy import optimize

from ivdossier.estimation import plot_data, robust_inference
from ivdossier.estimation.api import estimate_prepared
from ivdossier.estimation.data import prepare
from ivdossier.estimation.roots import brentq

FUNCTIONS: dict[str, tuple[Callable[[float], float], list[tuple[float, float]]]] = {
    "x^2 - 2": (lambda x: x * x - 2.0, [(0.0, 2.0), (1.0, 1.5), (-3.0, -1.0), (1.4142135623730951, 3.0)]),
    "cos x - x": (lambda x: math.cos(x) - x, [(0.0, 1.0), (-2.0, 3.0)]),
    "x^3 - x - 1": (lambda x: x**3 - x - 1.0, [(1.0, 2.0), (-10.0, 10.0), (0.0, 100.0)]),
    "steep tanh": (lambda x: math.tanh(50.0 * (x - 0.3)), [(-1.0, 1.0), (0.29, 0.31)]),
    "flat cube": (lambda x: (x - 1.0) ** 3, [(0.0, 3.0), (-5.0, 1.5)]),
    "exp - 10": (lambda x: math.exp(x) - 10.0, [(0.0, 5.0), (-50.0, 50.0)]),
    "step": (lambda x: -1.0 if x < 0.123 else 1.0, [(0.0, 1.0), (-7.0, 3.0)]),
    "tiny values": (lambda x: 1e-200 * (x - 0.3), [(0.0, 1.0), (-2.0, 2.0)]),
    "huge values": (lambda x: 1e200 * (x - 0.3), [(0.0, 1.0)]),
    "large root": (lambda x: x - 1e9 - 0.5, [(0.0, 2e9)]),
    "tiny root": (lambda x: x - 1e-9, [(-1.0, 1.0)]),
    "tan(theta) - 2": (lambda t: math.tan(t) - 2.0, [(-1.5, 1.5), (0.5, 1.2)]),
    "log": (lambda x: math.log(x) - 0.5, [(0.1, 10.0)]),
    "sin": (lambda x: math.sin(x), [(3.0, 4.0), (-1.0, 0.7)]),
    "root at an end": (lambda x: x - 2.0, [(2.0, 5.0), (-1.0, 2.0)]),
}
XTOLS = (2e-12, 1e-12, 8e-12, 1e-6, 1e-3, 0.5)
RTOLS = (4 * np.finfo(float).eps, 1e-10, 1e-4)


def _outcome(
    solver: Callable[..., float], f: Callable[[float], float], *args: float, **kw: float
) -> tuple[Any, ...]:
    """(root or error type and message, sign of the root, every point where f was evaluated)."""
    seen: list[float] = []

    def g(x: float) -> float:
        seen.append(x)
        return f(x)

    try:
        root = float(solver(g, *args, **kw))
    except (ValueError, RuntimeError) as err:
        return type(err).__name__, str(err), seen
    return root, math.copysign(1.0, root), seen


@pytest.mark.parametrize("name", sorted(FUNCTIONS))
def test_same_root_and_same_evaluations_as_scipy(name: str) -> None:
    f, brackets = FUNCTIONS[name]
    roots = 0
    for (a, b), xtol, rtol in itertools.product(brackets, XTOLS, RTOLS):
        for lo, hi in ((a, b), (b, a)):
            ours = _outcome(brentq, f, lo, hi, xtol=xtol, rtol=rtol)
            want = _outcome(optimize.brentq, f, lo, hi, xtol=xtol, rtol=rtol)
            assert ours == want, (name, lo, hi, xtol, rtol)
            roots += isinstance(want[0], float)
    assert roots > 0, "every bracket of this function fails: the comparison would check only errors"


def test_random_cubics() -> None:
    rng = np.random.default_rng(5)
    for _ in range(300):
        r1, r2, r3 = np.sort(rng.normal(scale=10.0, size=3))
        scale = 10.0 ** rng.uniform(-6, 6)

        def f(x: float, r1: float = r1, r2: float = r2, r3: float = r3, s: float = scale) -> float:
            return s * (x - r1) * (x - r2) * (x - r3)

        a = float(r1 - rng.uniform(0.01, 5.0))
        b = float(0.5 * (r1 + r2))
        xtol = float(10.0 ** rng.uniform(-13, -2))
        assert brentq(f, a, b, xtol=xtol) == optimize.brentq(f, a, b, xtol=xtol)


def test_same_errors_as_scipy() -> None:
    cases: list[tuple[Callable[[float], float], float, float, dict[str, float]]] = [
        (lambda x: x * x + 1.0, -1.0, 1.0, {}),  # no sign change
        (lambda x: math.nan if x > 0.5 else x - 0.75, 0.0, 1.0, {}),  # nan at b
        (lambda x: math.cos(x) - x, 0.0, 1.0, {"xtol": 0.0}),
        (lambda x: math.cos(x) - x, 0.0, 1.0, {"rtol": 1e-17}),
        (lambda x: math.cos(x) - x, 0.0, 1.0, {"maxiter": 3, "xtol": 1e-15}),  # no convergence
    ]
    for f, a, b, kw in cases:
        with pytest.raises((ValueError, RuntimeError)) as want:
            optimize.brentq(f, a, b, **kw)  # type: ignore[arg-type]
        with pytest.raises(want.type, match="^" + __import__("re").escape(str(want.value)) + "$"):
            brentq(f, a, b, **kw)  # type: ignore[arg-type]


@pytest.fixture
def prepared():  # type: ignore[no-untyped-def]
    rng = np.random.default_rng(33)
    n = 2500
    g = rng.integers(0, 60, size=n)
    z = rng.normal(size=(n, 2))
    u = rng.normal(size=n)
    x = z @ np.array([0.12, 0.08]) + u + rng.normal(size=n)
    y = -0.3 * x - u + rng.normal(size=n)
    frame = pd.DataFrame({"y": y, "x": x, "z1": z[:, 0], "z2": z[:, 1], "w": rng.normal(size=n), "g": g})
    return frame


@pytest.mark.parametrize("vcov", ["homoskedastic", "heteroskedastic", "clustered"])
@pytest.mark.parametrize("instruments", [("z1",), ("z1", "z2")])
def test_ar_set_ends_and_curve_are_those_scipy_brentq_gives(prepared, monkeypatch, vcov, instruments) -> None:  # type: ignore[no-untyped-def]
    """The functions plot_data and the AR set inversion hand to brentq, solved by the port and by scipy."""
    data = prepare(
        prepared,
        outcome="y",
        treatment="x",
        instruments=instruments,
        controls=("w",),
        cluster="g" if vcov == "clustered" else None,
    )
    result = estimate_prepared(data, method="2sls", vcov=vcov)
    ours = (plot_data.ar_curve(data, result), result.to_dict())
    calls: list[int] = []

    def scipy_brentq(f: Callable[[float], float], a: float, b: float, **kw: float) -> float:
        calls.append(1)
        return float(optimize.brentq(f, a, b, **kw))

    monkeypatch.setattr(plot_data, "brentq", scipy_brentq)
    monkeypatch.setattr(robust_inference, "brentq", scipy_brentq)
    reference = estimate_prepared(data, method="2sls", vcov=vcov)
    theirs = (plot_data.ar_curve(data, reference), reference.to_dict())
    assert calls, "the check must go through brentq"
    assert ours == theirs
