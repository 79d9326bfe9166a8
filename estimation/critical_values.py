"""Critical values for weak-instrument diagnostics: Stock–Yogo tables, the tF function and MOP effective F.

* Stock and Yogo (2005), Tables 5.1 (2SLS relative bias), 5.2 (2SLS size) and 5.4 (LIML size): only the cells
  listed in ``data/stock_yogo.csv`` (one endogenous regressor, small K2) are carried; any other cell is
  reported as not available with a reason, never guessed.
* Lee, McCrary, Moreira and Porter (2022), Table 3: the 5 % tF critical-value function, carried on the
  subset of the published sqrt(F) grid listed in ``data/tf_critical_values.csv``, interpolated linearly in
  sqrt(F).
* Montiel Olea and Pflueger (2013): critical values of the effective F from the simplified conservative
  procedure, a noncentral chi-square quantile with K_eff degrees of freedom.
"""

from __future__ import annotations

import csv
import math
from dataclasses import dataclass
from functools import cache
from pathlib import Path
from typing import Any

import numpy as np

from ivdossier.errors import InvalidInputError
from ivdossier.estimation.distributions import ncx2_ppf
from ivdossier.jsonsafe import Record

DATA_DIR = Path(__file__).resolve().parent / "data"
STOCK_YOGO_SOURCE = "Stock and Yogo (2005), Testing for Weak Instruments in Linear IV Regression"
TF_SOURCE = "Lee, McCrary, Moreira and Porter (2022), Valid t-ratio Inference for IV, AER, Table 3"
MOP_SOURCE = (
    "Montiel Olea and Pflueger (2013), A Robust Test for Weak Instruments, JBES (simplified procedure)"
)
TF_UNBOUNDED_BELOW = 4.0
TF_NORMAL_FROM = 104.67
MOP_TAUS: tuple[float, ...] = (0.05, 0.10, 0.20, 0.30)

_TABLE_NAMES = {
    ("2sls", "relative_bias"): "Table 5.1 (2SLS relative bias)",
    ("2sls", "size"): "Table 5.2 (2SLS size of a nominal 5 % Wald test)",
    ("fuller", "relative_bias"): "Table 5.3 (Fuller-k relative bias)",
    ("liml", "size"): "Table 5.4 (LIML size of a nominal 5 % Wald test)",
}
_LEVELS = {"relative_bias": (0.05, 0.10, 0.20, 0.30), "size": (0.10, 0.15, 0.20, 0.25)}
_METHOD_TABLES = {
    "2sls": (("2sls", "relative_bias"), ("2sls", "size")),
    "liml": (("liml", "size"),),
    "fuller": (("fuller", "relative_bias"),),
}
_METHOD_ALIASES = {
    "2sls": "2sls",
    "tsls": "2sls",
    "iv": "2sls",
    "gmm": "2sls",
    "liml": "liml",
    "fuller": "fuller",
}


def _read_rows(name: str) -> list[dict[str, str]]:
    with (DATA_DIR / name).open(newline="", encoding="utf-8") as fh:
        lines = [ln for ln in fh if ln.strip() and not ln.lstrip().startswith("#")]
    return list(csv.DictReader(lines))


@cache
def _stock_yogo_cells() -> dict[tuple[str, str, int, int, float], float]:
    cells: dict[tuple[str, str, int, int, float], float] = {}
    for row in _read_rows("stock_yogo.csv"):
        key = (row["estimator"], row["criterion"], int(row["n_endog"]), int(row["k2"]), float(row["level"]))
        cells[key] = float(row["critical_value"])
    return cells


@cache
def tf_grid() -> tuple[tuple[float, float], ...]:
    """The carried (F, critical value) rows of the tF function, sorted by F."""
    rows = [(float(r["f"]), float(r["critical_value"])) for r in _read_rows("tf_critical_values.csv")]
    return tuple(sorted(rows))


@dataclass(frozen=True)
class StockYogoValue(Record):
    """One Stock–Yogo cell; ``critical_value`` is None, with ``reason``, when the cell is not carried."""

    table: str
    estimator: str
    criterion: str
    n_endog: int
    k2: int
    level: float
    critical_value: float | None
    reason: str | None = None

    def to_dict(self) -> dict[str, Any]:
        """JSON-safe dict."""
        return {
            "table": self.table,
            "source": STOCK_YOGO_SOURCE,
            "estimator": self.estimator,
            "criterion": self.criterion,
            "n_endog": self.n_endog,
            "k2": self.k2,
            "level": self.level,
            "critical_value": self.critical_value,
            "reason": self.reason,
        }


def normalise_method(method: str) -> str:
    """Map an estimator name to the Stock–Yogo table family ('2sls', 'liml' or 'fuller')."""
    key = method.strip().lower()
    if key not in _METHOD_ALIASES:
        raise InvalidInputError(
            f"Unknown estimator {method!r} for Stock–Yogo tables; "
            f"use one of {', '.join(sorted(_METHOD_ALIASES))}."
        )
    return _METHOD_ALIASES[key]


def stock_yogo_critical_value(
    *, estimator: str, criterion: str, n_endog: int, k2: int, level: float
) -> StockYogoValue:
    """Look up one Stock–Yogo (2005) cell; a cell not carried comes back with value None and the reason."""
    est = normalise_method(estimator)
    if (est, criterion) not in _TABLE_NAMES:
        raise InvalidInputError(
            f"No Stock–Yogo table for estimator {est!r} and criterion {criterion!r}; "
            "use 2sls with relative_bias or size, liml with size, or fuller with relative_bias."
        )
    if level not in _LEVELS[criterion]:
        raise InvalidInputError(
            f"Stock–Yogo {criterion} tables are tabulated at levels {_LEVELS[criterion]}, not {level}; "
            "pick one of those."
        )
    table = _TABLE_NAMES[(est, criterion)]
    value = _stock_yogo_cells().get((est, criterion, n_endog, k2, level))
    reason = None
    if value is None:
        if est == "2sls" and criterion == "relative_bias" and k2 < n_endog + 2:
            reason = (
                "the relative-bias criterion is defined only when K2 >= n_endog + 2 (Stock and Yogo 2005)"
            )
        else:
            reason = (
                f"this cell ({table}, n_endog = {n_endog}, K2 = {k2}) is not carried: only the cells "
                "verified in the project's reference values are included; read it from the published table"
            )
    return StockYogoValue(table, est, criterion, n_endog, k2, level, value, reason)


def stock_yogo_applicable(*, method: str, n_endog: int, k2: int) -> tuple[StockYogoValue, ...]:
    """All Stock–Yogo critical values that apply to this estimator, K2 and number of endogenous regressors."""
    est = normalise_method(method)
    out: list[StockYogoValue] = []
    for table_est, criterion in _METHOD_TABLES[est]:
        for level in _LEVELS[criterion]:
            out.append(
                stock_yogo_critical_value(
                    estimator=table_est, criterion=criterion, n_endog=n_endog, k2=k2, level=level
                )
            )
    return tuple(out)


def tf_critical_value(f: float) -> float:
    """5 % tF critical value for first-stage F (Lee, McCrary, Moreira and Porter 2022); inf below F = 4.

    Linear interpolation in sqrt(F) between carried grid rows; 1.96 at and above F = 104.67.
    """
    if not math.isfinite(f) and f > 0:
        return 1.96
    if math.isnan(f):
        raise InvalidInputError("The first-stage F is NaN; check the first stage for collinear instruments.")
    if f < TF_UNBOUNDED_BELOW:
        return math.inf
    if f >= TF_NORMAL_FROM:
        return 1.96
    grid = tf_grid()
    roots = np.sqrt([g[0] for g in grid])
    values = np.array([g[1] for g in grid])
    return float(np.interp(math.sqrt(f), roots, values))


def mop_k_eff(s: np.ndarray, tau: float) -> float:
    """Effective degrees of freedom of the MOP simplified procedure for Nagar-bias threshold tau.

    K_eff = (1 + 2x) tr(S)^2 / (tr(S'S) + 2x tr(S) maxeig(S)), x = 1/tau, with S the covariance of the
    first-stage moments (any positive scale: K_eff is invariant to it).
    """
    mat = np.atleast_2d(np.asarray(s, dtype=np.float64))
    if mat.shape[0] != mat.shape[1]:
        raise InvalidInputError(
            f"S must be square, got shape {mat.shape}; pass the moment covariance matrix."
        )
    if not 0 < tau < 1:
        raise InvalidInputError(
            f"tau must lie in (0, 1), got {tau}; use e.g. 0.10 for a 10 % bias threshold."
        )
    x = 1.0 / tau
    sym = (mat + mat.T) / 2
    tr = float(np.trace(sym))
    max_eig = float(np.linalg.eigvalsh(sym).max())
    denom = float(np.sum(sym * sym)) + 2 * x * tr * max_eig
    if tr <= 0 or denom <= 0:
        raise InvalidInputError(
            "S must be positive semi-definite with positive trace; check the moment covariance."
        )
    return (1 + 2 * x) * tr**2 / denom


def mop_critical_value(k_eff: float, tau: float, *, level: float = 0.05) -> float:
    """MOP simplified critical value: the (1 - level) quantile of ncx2(K_eff, K_eff / tau) over K_eff."""
    if k_eff <= 0:
        raise InvalidInputError(f"K_eff must be positive, got {k_eff}.")
    x = 1.0 / tau
    return ncx2_ppf(1 - level, k_eff, x * k_eff) / k_eff
