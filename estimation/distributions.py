"""Quantiles and tail probabilities of the reference distributions, for scalar arguments, without scipy.stats.

Each function calls the same `scipy.special` routine that `scipy.stats` calls for the distribution's `_ppf` or
`_sf` (scipy 1.17: `norm` -> `ndtri`/`ndtr`, `chi2` -> `gammaincinv`/`chdtrc`, `t` -> `stdtrit`/`stdtr`, `f` ->
`fdtri`, `ncx2` -> `chndtrix`), so the numbers are the same bit for bit (tests/test_distributions.py
compares them). Importing `scipy.stats` builds every distribution object and costs about a second of start-up,
which documents that only read stored results (a dossier's literature audit, a result's interval) should not
pay; `scipy.special` is imported on first use.
"""

from __future__ import annotations

from typing import Any


def _special() -> Any:
    from scipy import special

    return special


def norm_ppf(q: float) -> float:
    """Standard normal quantile (scipy.stats.norm.ppf)."""
    return float(_special().ndtri(q))


def norm_sf(x: float) -> float:
    """Standard normal upper tail P(Z > x) (scipy.stats.norm.sf)."""
    return float(_special().ndtr(-x))


def chi2_ppf(q: float, df: float) -> float:
    """Chi-squared quantile (scipy.stats.chi2.ppf)."""
    return float(2 * _special().gammaincinv(df / 2, q))


def chi2_sf(x: float, df: float) -> float:
    """Chi-squared upper tail (scipy.stats.chi2.sf)."""
    return float(_special().chdtrc(df, x))


def t_ppf(q: float, df: float) -> float:
    """Student t quantile (scipy.stats.t.ppf)."""
    return float(_special().stdtrit(df, q))


def t_sf(x: float, df: float) -> float:
    """Student t upper tail (scipy.stats.t.sf)."""
    return float(_special().stdtr(df, -x))


def f_ppf(q: float, dfn: float, dfd: float) -> float:
    """F quantile (scipy.stats.f.ppf)."""
    return float(_special().fdtri(dfn, dfd, q))


def ncx2_ppf(q: float, df: float, nc: float) -> float:
    """Noncentral chi-squared quantile (scipy.stats.ncx2.ppf); nc = 0 is the central chi-squared."""
    if nc == 0:
        return chi2_ppf(q, df)
    return float(_special().chndtrix(q, df, nc))
