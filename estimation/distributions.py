"""Quantiles and tail probabilities of the reference distributions, without scipy.stats.

Each function calls the same `scipy.special` routine that `scipy.stats` calls for the distribution's `_ppf` or
`_sf` (scipy 1.17: `norm` -> `ndtri`/`ndtr`, `chi2` -> `gammaincinv`/`chdtrc`, `t` -> `stdtrit`/`stdtr`, `f` ->
`fdtri`/`fdtrc`, `ncx2` -> `chndtrix`) inside the same edge handling as scipy.stats' `sf` and `ppf` (nan for a
bad parameter, 1 at or below the support's lower end, the support's ends at q = 0 and 1), so the numbers are the
same bit for bit (tests/test_distributions.py compares them). The `*_array` functions take arrays (broadcast
like scipy.stats); the others take and return floats. Importing `scipy.stats` builds every distribution object
and costs a large part of a command's start-up, which documents that only read stored results and the
`estimate` command should not pay; `scipy.special` is imported on first use.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np

INF = float("inf")


def _special() -> Any:
    from scipy import special

    return special


def _valid(params: tuple[Any, ...]) -> Any:
    """scipy.stats' default parameter check: every shape parameter > 0."""
    ok = np.asarray(True)
    for p in params:
        ok = ok & (np.asarray(p) > 0)
    return ok


def _sf(tail: Callable[..., Any], x: Any, params: tuple[Any, ...], lower: float) -> Any:
    """scipy.stats' `sf` around an upper-tail routine: nan for a bad parameter or x, 1 at or below the support's
    lower end, 0 at +inf, the routine in between."""
    x = np.asarray(x)
    x = np.asarray(x, dtype=np.promote_types(x.dtype, np.float64))
    ok = _valid(params)
    inner = np.where(x <= lower, 1.0, np.where(x < INF, tail(x, *params), 0.0))
    out = np.where(~ok | np.isnan(x), np.nan, inner)
    return out[()] if out.ndim == 0 else out


def _ppf(inverse: Callable[..., Any], q: Any, params: tuple[Any, ...], lower: float) -> Any:
    """scipy.stats' `ppf` around an inverse routine: the support's ends at q = 0 and 1, nan outside [0, 1]
    or for a bad parameter; `+ 0.0` is scipy's `* scale + loc` (it turns -0.0 into 0.0)."""
    q = np.asarray(q)
    ok = _valid(params)
    inner = np.where(q == 0, lower, np.where(q == 1, INF, inverse(q, *params) * 1.0 + 0.0))
    out = np.where(ok & (q >= 0) & (q <= 1), inner, np.nan)
    return out[()] if out.ndim == 0 else out


def norm_sf_array(x: Any) -> Any:
    """Standard normal upper tail P(Z > x) (scipy.stats.norm.sf)."""
    return _sf(lambda v: _special().ndtr(-v), x, (), -INF)


def t_sf_array(x: Any, df: Any) -> Any:
    """Student t upper tail (scipy.stats.t.sf)."""
    return _sf(lambda v, n: _special().stdtr(n, -v), x, (df,), -INF)


def chi2_sf_array(x: Any, df: Any) -> Any:
    """Chi-squared upper tail (scipy.stats.chi2.sf)."""
    return _sf(lambda v, n: _special().chdtrc(n, v), x, (df,), 0.0)


def f_sf_array(x: Any, dfn: Any, dfd: Any) -> Any:
    """F upper tail (scipy.stats.f.sf)."""
    return _sf(lambda v, n, d: _special().fdtrc(n, d, v), x, (dfn, dfd), 0.0)


def norm_ppf(q: float) -> float:
    """Standard normal quantile (scipy.stats.norm.ppf)."""
    return float(_ppf(lambda p: _special().ndtri(p), q, (), -INF))


def norm_sf(x: float) -> float:
    """Standard normal upper tail P(Z > x) (scipy.stats.norm.sf)."""
    return float(norm_sf_array(x))


def chi2_ppf(q: float, df: float) -> float:
    """Chi-squared quantile (scipy.stats.chi2.ppf)."""
    return float(_ppf(lambda p, n: 2 * _special().gammaincinv(n / 2, p), q, (df,), 0.0))


def chi2_sf(x: float, df: float) -> float:
    """Chi-squared upper tail (scipy.stats.chi2.sf)."""
    return float(chi2_sf_array(x, df))


def t_ppf(q: float, df: float) -> float:
    """Student t quantile (scipy.stats.t.ppf)."""
    return float(_ppf(lambda p, n: _special().stdtrit(n, p), q, (df,), -INF))


def t_sf(x: float, df: float) -> float:
    """Student t upper tail (scipy.stats.t.sf)."""
    return float(t_sf_array(x, df))


def f_ppf(q: float, dfn: float, dfd: float) -> float:
    """F quantile (scipy.stats.f.ppf)."""
    return float(_ppf(lambda p, n, d: _special().fdtri(n, d, p), q, (dfn, dfd), 0.0))


def f_sf(x: float, dfn: float, dfd: float) -> float:
    """F upper tail (scipy.stats.f.sf)."""
    return float(f_sf_array(x, dfn, dfd))


def ncx2_ppf(q: float, df: float, nc: float) -> float:
    """Noncentral chi-squared quantile (scipy.stats.ncx2.ppf); nc = 0 is the central chi-squared."""
    if nc == 0:
        return chi2_ppf(q, df)
    return float(_special().chndtrix(q, df, nc))
