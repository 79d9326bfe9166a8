"""Jackknife IV estimators for many instruments (e.g. one dummy per decision-maker): JIVE1 and UJIVE.

Definitions follow Kolesár (2013), "Estimation in an instrumental variables model with treatment effect
heterogeneity". With controls W (an intercept is always included), all instruments A = [W, Z], hat matrices
H_A, H_W with diagonals D_A, D_W and residual makers M = I - H:

* 2SLS uses the instrument (H_A - H_W) x;
* JIVE1 (Angrist, Imbens and Krueger 1999) predicts x_i from A without case i,
  x~ = (I - D_A)^-1 (H_A - D_A) x = x - (I - D_A)^-1 M_A x, and estimates b = x~' M_W y / x~' M_W x;
* UJIVE subtracts the leave-one-out prediction from W alone as well,
  x^ = (I - D_A)^-1 (H_A - D_A) x - (I - D_W)^-1 (H_W - D_W) x = (I - D_W)^-1 M_W x - (I - D_A)^-1 M_A x,
  and estimates b = x^' y / x^' x.

With decision-maker dummies and no controls, JIVE1's instrument is the decision-maker's leave-one-out treatment
rate and UJIVE's is that rate minus the leave-one-out overall rate.

Standard errors treat the constructed instrument as fixed (heteroskedasticity-robust, no small-sample factor):
se^2 = sum_i (q_i e_i)^2 / (q'x)^2 with e = M_W (y - x b) and q the estimator's instrument. They are not robust
to many weak instruments; use the jackknife Anderson-Rubin test (:mod:`many_instruments`) for that.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any

import numpy as np
from numpy.typing import NDArray

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.absorb import is_nested
from ivdossier.jsonsafe import Record, json_safe

if TYPE_CHECKING:  # pandas is imported where data is read, so reading stored results stays light
    import pandas as pd

Array = NDArray[np.float64]
RANK_TOL = 1e-9
LEVERAGE_TOL = 1e-9
MAX_DENSE_CELLS = 30_000_000  # n x (instruments + controls) above which the dense path refuses
SE_NOTE = (
    "heteroskedasticity-robust, treating the jackknife instrument as fixed (no small-sample factor); "
    "not robust to many weak instruments: use the jackknife Anderson-Rubin test for that"
)
CAUTION = (
    "Jackknife estimators remove the many-instrument bias of 2SLS; they cannot establish exclusion, "
    "exogeneity or monotonicity of the decision-maker assignment. Conclusions for policy or clinical "
    "decisions need domain review."
)
METHOD_LABELS = {"2sls": "2SLS (all instruments)", "jive1": "JIVE1", "ujive": "UJIVE"}


@dataclass(frozen=True)
class JackknifeEstimate(Record):
    """One estimator's coefficient on the treatment, with its standard error and confidence interval."""

    method: str
    estimate: float
    std_error: float
    ci_low: float
    ci_high: float

    def to_dict(self) -> dict[str, Any]:
        return dict(
            json_safe(
                {
                    "method": self.method,
                    "estimate": self.estimate,
                    "std_error": self.std_error,
                    "ci": [self.ci_low, self.ci_high],
                }
            )
        )


@dataclass(frozen=True)
class JackknifeIVResult(Record):
    """2SLS, JIVE1 and UJIVE on the same instruments and controls."""

    estimates: tuple[JackknifeEstimate, ...]
    n: int
    n_instruments: int
    n_controls: int
    alpha: float
    path: str
    se_note: str = SE_NOTE
    caution: str = CAUTION

    def get(self, method: str) -> JackknifeEstimate:
        """The estimate of one method ("2sls", "jive1" or "ujive")."""
        for e in self.estimates:
            if e.method == method:
                return e
        raise InvalidInputError(f"Unknown method {method!r}; choose one of {', '.join(METHOD_LABELS)}.")

    def to_dict(self) -> dict[str, Any]:
        return {
            "kind": "jackknife_iv",
            "estimates": [e.to_dict() for e in self.estimates],
            "n": self.n,
            "n_instruments": self.n_instruments,
            "n_controls": self.n_controls,
            "alpha": self.alpha,
            "path": self.path,
            "se_note": self.se_note,
            "caution": self.caution,
        }

    def __str__(self) -> str:
        level = f"{100 * (1 - self.alpha):g}%"
        lines = [
            f"Jackknife IV: {self.n:,} cases, {self.n_instruments:,} instruments, "
            f"{self.n_controls:,} control columns (incl. intercept)",
            f"  {'method':<24}{'estimate':>12}{'std. error':>12}   {level} interval",
        ]
        for e in self.estimates:
            lines.append(
                f"  {METHOD_LABELS[e.method]:<24}{e.estimate:>12.4g}{e.std_error:>12.4g}   "
                f"[{e.ci_low:.4g}, {e.ci_high:.4g}]"
            )
        lines += [f"  standard errors: {self.se_note}", f"  {self.caution}"]
        return "\n".join(lines)


def orthonormal_basis(a: np.ndarray, tol: float = RANK_TOL) -> Array:
    """Orthonormal basis of the column space of ``a`` (pivoted QR; columns with |R_jj| <= tol |R_00| dropped)."""
    import scipy.linalg

    q, r, _ = scipy.linalg.qr(a, mode="economic", pivoting=True)
    diag = np.abs(np.diag(r))
    rank = int(np.count_nonzero(diag > tol * diag[0])) if diag.size and diag[0] > 0 else 0
    return np.asarray(q[:, :rank], dtype=np.float64)


@dataclass(frozen=True, eq=False)
class _Projections:
    """What the estimators need: M_A x, M_W x, M_W y, H_A x - H_W x and the two leverage diagonals."""

    ma_x: Array
    mw_x: Array
    mw_y: Array
    d_a: Array
    d_w: Array
    mw_scaled_ma_x: Array  # M_W (I - D_A)^-1 M_A x
    n_instruments: int
    n_controls: int


def _check_leverage(d_a: Array) -> None:
    bad = np.flatnonzero(d_a > 1 - LEVERAGE_TOL)
    if bad.size:
        raise EstimationError(
            f"{bad.size} row(s) have leverage one on the instruments (positions {bad[:8].tolist()}), e.g. a "
            "decision-maker or cell with a single case; their leave-one-out prediction is undefined: drop them."
        )


def _estimates(y: Array, x: Array, p: _Projections, alpha: float) -> tuple[JackknifeEstimate, ...]:
    from scipy import stats

    two_sls = p.mw_x - p.ma_x  # (H_A - H_W) x
    jive1 = p.mw_x - p.mw_scaled_ma_x  # M_W x~ with x~ = x - (I - D_A)^-1 M_A x
    ujive = p.mw_x / (1 - p.d_w) - p.ma_x / (1 - p.d_a)
    z = float(stats.norm.ppf(1 - alpha / 2))
    out = []
    for method, q in (("2sls", two_sls), ("jive1", jive1), ("ujive", ujive)):
        den = float(q @ x)
        if not np.isfinite(den) or abs(den) <= 1e-12 * np.sqrt(float(q @ q) * float(x @ x)):
            raise EstimationError(
                f"{METHOD_LABELS[method]}: the instrument is orthogonal to the treatment (no first stage); "
                "check that the treatment varies across decision-makers within the controls."
            )
        beta = float(q @ y) / den
        resid = p.mw_y - beta * p.mw_x
        se = float(np.sqrt(np.sum((q * resid) ** 2)) / abs(den))
        out.append(JackknifeEstimate(method, beta, se, beta - z * se, beta + z * se))
    return tuple(out)


def _check_arrays(y: np.ndarray, x: np.ndarray, n: int) -> tuple[Array, Array]:
    yv = np.asarray(y, dtype=np.float64).ravel()
    xv = np.asarray(x, dtype=np.float64).ravel()
    if yv.size != n or xv.size != n:
        raise InvalidInputError(
            f"outcome ({yv.size}), treatment ({xv.size}) and instruments ({n}) must have the same number of rows."
        )
    for label, v in (("outcome", yv), ("treatment", xv)):
        bad = np.flatnonzero(~np.isfinite(v))
        if bad.size:
            raise InvalidInputError(
                f"The {label} is missing or infinite at positions {bad[:8].tolist()}; drop them."
            )
    return yv, xv


def jackknife_iv(
    y: np.ndarray,
    x: np.ndarray,
    instruments: np.ndarray,
    controls: np.ndarray | None = None,
    *,
    alpha: float = 0.05,
) -> JackknifeIVResult:
    """2SLS, JIVE1 and UJIVE of ``y`` on one treatment ``x`` with ``instruments`` (n x K) and ``controls`` (n x L).

    An intercept is added to the controls. Dense computation (pivoted QR of the instruments and controls); for
    decision-maker dummies on large data use :func:`decision_maker_jackknife_iv`, which has a grouped path.
    """
    zmat = np.asarray(instruments, dtype=np.float64)
    zmat = zmat[:, None] if zmat.ndim == 1 else zmat
    n = zmat.shape[0]
    yv, xv = _check_arrays(y, x, n)
    wmat = np.ones((n, 1)) if controls is None else np.column_stack([np.ones(n), np.asarray(controls, float)])
    if n * (wmat.shape[1] + zmat.shape[1]) > MAX_DENSE_CELLS:
        raise EstimationError(
            f"{n:,} rows x {wmat.shape[1] + zmat.shape[1]:,} instrument and control columns is too large for the "
            "dense jackknife; use decision_maker_jackknife_iv (grouped path) or fewer columns."
        )
    if not (np.all(np.isfinite(zmat)) and np.all(np.isfinite(wmat))):
        raise InvalidInputError(
            "Instruments and controls must be finite; drop rows with missing values first."
        )
    qa = orthonormal_basis(np.column_stack([wmat, zmat]))
    qw = orthonormal_basis(wmat)
    if qa.shape[1] <= qw.shape[1]:
        raise EstimationError(
            "The instruments are collinear with the controls; nothing is left to instrument with."
        )

    def mw(v: Array) -> Array:
        return np.asarray(v - qw @ (qw.T @ v), dtype=np.float64)

    d_a = np.einsum("ij,ij->i", qa, qa)
    _check_leverage(d_a)
    ma_x = xv - qa @ (qa.T @ xv)
    proj = _Projections(
        ma_x=ma_x,
        mw_x=mw(xv),
        mw_y=mw(yv),
        d_a=d_a,
        d_w=np.einsum("ij,ij->i", qw, qw),
        mw_scaled_ma_x=mw(ma_x / (1 - d_a)),
        n_instruments=qa.shape[1] - qw.shape[1],
        n_controls=qw.shape[1],
    )
    return _finish(yv, xv, proj, alpha, "dense")


def _finish(y: Array, x: Array, proj: _Projections, alpha: float, path: str) -> JackknifeIVResult:
    if not 0 < alpha < 1:
        raise InvalidInputError(f"alpha must lie strictly between 0 and 1, got {alpha!r}.")
    est = _estimates(y, x, proj, alpha)
    return JackknifeIVResult(est, y.size, proj.n_instruments, proj.n_controls, alpha, path)


def _group_mean(v: Array, codes: np.ndarray, counts: Array) -> Array:
    return np.asarray(
        (np.bincount(codes, weights=v, minlength=counts.size) / counts)[codes], dtype=np.float64
    )


def decision_maker_jackknife_iv(
    data: pd.DataFrame,
    *,
    outcome: str,
    treatment: str,
    decision_maker: str,
    absorb: str | None = None,
    controls: str | Sequence[str] = (),
    alpha: float = 0.05,
) -> JackknifeIVResult:
    """2SLS, JIVE1 and UJIVE with one dummy per decision-maker as the instruments.

    ``absorb`` names one column of cells (e.g. court-by-month) whose dummies are controls. When there are no
    other controls and each decision-maker works within one cell (or no cells are given) the hat matrices are
    group means and the computation is one grouped pass; otherwise the dense path is used.
    """
    import pandas as pd

    ctrl = (controls,) if isinstance(controls, str) else tuple(controls)
    cols = [outcome, treatment, decision_maker, *([absorb] if absorb else []), *ctrl]
    missing = [c for c in cols if c not in data.columns]
    if missing:
        raise InvalidInputError(f"Column(s) {missing} not found in the data; check the names.")
    na = data[cols].isna().any(axis=1).to_numpy()
    if na.any():
        raise InvalidInputError(
            f"{int(na.sum())} row(s) have missing values in {cols} (index {data.index[na][:8].tolist()}); "
            "drop or fill them first."
        )
    for c in (outcome, treatment, *ctrl):
        if not (pd.api.types.is_numeric_dtype(data[c]) or pd.api.types.is_bool_dtype(data[c])):
            raise InvalidInputError(
                f"Column {c!r} must be numeric, got dtype {data[c].dtype}; recode it as numbers."
            )
    y = data[outcome].to_numpy(dtype=np.float64)
    x = data[treatment].to_numpy(dtype=np.float64)
    dm, dm_ids = pd.factorize(data[decision_maker], sort=False)
    counts = np.bincount(dm)
    singles = np.flatnonzero(counts == 1)
    if singles.size:
        raise InvalidInputError(
            f"{singles.size} decision-maker(s) in {decision_maker!r} have a single case "
            f"({[str(dm_ids[i]) for i in singles[:8]]}); their leave-one-out prediction is undefined: drop those "
            "cases or merge the decision-makers."
        )
    cells = pd.factorize(data[absorb], sort=False)[0] if absorb else np.zeros(len(data), dtype=np.int64)
    if not ctrl and is_nested(dm, cells):
        n_dm = counts.astype(np.float64)
        n_cell = np.bincount(cells).astype(np.float64)

        def mw(v: Array) -> Array:
            return np.asarray(v - _group_mean(v, cells, n_cell), dtype=np.float64)

        d_a = 1.0 / n_dm[dm]
        ma_x = x - _group_mean(x, dm, n_dm)
        proj = _Projections(
            ma_x=ma_x,
            mw_x=mw(x),
            mw_y=mw(y),
            d_a=d_a,
            d_w=1.0 / n_cell[cells],
            mw_scaled_ma_x=mw(ma_x / (1 - d_a)),
            n_instruments=int(counts.size - n_cell.size),
            n_controls=int(n_cell.size),
        )
        if proj.n_instruments < 1:
            raise EstimationError(
                "Every cell has a single decision-maker, so decision-maker dummies add nothing to the cells."
            )
        return _finish(y, x, proj, alpha, "grouped")
    dummies = np.zeros((len(data), counts.size))
    dummies[np.arange(len(data)), dm] = 1.0
    parts = []
    if absorb:
        cd = np.zeros((len(data), int(cells.max()) + 1))
        cd[np.arange(len(data)), cells] = 1.0
        parts.append(cd[:, 1:])
    if ctrl:
        parts.append(data[list(ctrl)].to_numpy(dtype=np.float64))
    wmat = np.column_stack(parts) if parts else None
    return jackknife_iv(y, x, dummies[:, 1:], wmat, alpha=alpha)
