"""Per-cluster cross-products of [y, x, Z, W] and the statistics of any reweighting of the clusters.

Deleting a cluster (jackknife) or drawing clusters with replacement (pairs bootstrap) changes only how often
each cluster counts. With C_h the cross-product matrix of cluster h's rows of [y, x, Z, W] (sqrt(w)-scaled;
W the explicit partialled-out columns) and m_h its multiplicity, the totals are T = sum_h m_h C_h; W is
partialled out of T by its Schur complement (Frisch–Waugh–Lovell on cross-products), and every score that a
cluster-robust covariance needs is linear in C_h:

    Z~_h' r_h = F' C_h e,   F = [0; 0; I_L; -Gamma_Z],  e = coefficients of the residual r on [y, x, Z, W],

so 2SLS (one treatment), its cluster- or heteroskedasticity-robust t statistic, the Anderson–Rubin test and the
first-stage Wald F of every reweighting follow from small matrices, without touching the rows again.
Small-sample factors follow covariance.py: cluster G/(G-1) (n-1)/(n-k-p_c), robust n/(n-k-p), with G the
clusters counted with multiplicity, n the rows counted with multiplicity and p_c the partialled columns that
are not fixed-effect levels nested in the clusters.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

Array = NDArray[np.float64]


def cluster_crossproducts(cols: Array, codes: np.ndarray, n_groups: int) -> tuple[Array, Array]:
    """Per-cluster cross-products (G x m x m) of the columns and the number of rows in each cluster."""
    m = cols.shape[1]
    out = np.empty((n_groups, m, m))
    for i in range(m):
        for j in range(i + 1):
            out[:, i, j] = out[:, j, i] = np.bincount(
                codes, weights=cols[:, i] * cols[:, j], minlength=n_groups
            )
    return out, np.bincount(codes, minlength=n_groups).astype(np.float64)


@dataclass(frozen=True, eq=False)
class BatchStats:
    """Statistics of B reweightings (rows of ``mult``), each an array of length B."""

    beta: Array
    se: Array
    t: Array
    t_df: Array
    ar_f: Array
    ar_df: Array
    fs_f: Array
    pi: Array  # B x L first-stage coefficients


def _scores(cp_flat: Array, f: Array, e: Array) -> Array:
    """s[b, h, l] = F_b[:, l]' C_h e_b for every reweighting b and cluster h (B x H x L)."""
    n_b, m, n_l = f.shape
    outer = f[:, :, None, :] * e[:, None, :, None]  # B x m x m x L
    flat = outer.reshape(n_b, m * m, n_l)
    return np.asarray(np.einsum("hk,bkl->bhl", cp_flat, flat, optimize=True), dtype=np.float64)


def _wald(coef: Array, scores: Array, mult: Array, q: Array, factor: Array) -> Array:
    """coef' [Q (factor sum_h m_h s_h s_h') Q]^-1 coef for each reweighting."""
    meat = np.einsum("bh,bhl,bhk->blk", mult, scores, scores) * factor[:, None, None]
    cov = q @ meat @ q
    sol = np.linalg.solve(cov, coef[:, :, None])[:, :, 0]
    return np.asarray(np.einsum("bl,bl->b", coef, sol), dtype=np.float64)


def batch_stats(
    cp: Array,
    rows: Array,
    mult: Array,
    *,
    n_inst: int,
    kw: int,
    p_c: int,
    clustered: bool,
    null: float,
) -> BatchStats:
    """2SLS, t, AR and first-stage F of each reweighting ``mult`` (B x H) of clusters with cross-products ``cp``.

    Column order of ``cp``: y, x, the L instruments, then the kw partialled-out columns. ``rows`` holds the rows
    per cluster; ``null`` is the b0 of the t and AR tests.
    """
    h, m, _ = cp.shape
    n_b = mult.shape[0]
    cp_flat = cp.reshape(h, m * m)
    tot = (mult @ cp_flat).reshape(n_b, m, m)
    a = np.arange(2 + n_inst)
    wi = np.arange(2 + n_inst, m)
    if kw:
        gam = np.linalg.solve(tot[:, wi][:, :, wi], tot[:, wi][:, :, a])  # B x kw x (2+L)
        ta = tot[:, a][:, :, a] - tot[:, a][:, :, wi] @ gam
    else:
        gam = np.zeros((n_b, 0, 2 + n_inst))
        ta = tot
    zz = ta[:, 2:, 2:]
    zx = ta[:, 2:, 1]
    zy = ta[:, 2:, 0]
    q = np.asarray(np.linalg.inv(zz), dtype=np.float64)
    pi = np.einsum("blk,bk->bl", q, zx)
    den = np.einsum("bl,bl->b", zx, pi)
    beta = np.einsum("bl,bl->b", pi, zy) / den
    f = np.zeros((n_b, m, n_inst))
    f[:, 2 : 2 + n_inst, :] = np.eye(n_inst)
    f[:, 2 + n_inst :, :] = -gam[:, :, 2:]
    g_y, g_x, g_z = gam[:, :, 0], gam[:, :, 1], gam[:, :, 2:]
    # 2SLS residual y - x beta - W gamma
    e_t = np.zeros((n_b, m))
    e_t[:, 0] = 1.0
    e_t[:, 1] = -beta
    e_t[:, 2 + n_inst :] = -(g_y - beta[:, None] * g_x)
    fa = np.einsum("bml,bl->bm", f, pi)[:, :, None]
    s_t = _scores(cp_flat, fa, e_t)[:, :, 0]
    n_rows = mult @ rows
    n_cl = mult.sum(axis=1)

    def factor(k: int) -> Array:
        if clustered:
            return np.asarray(n_cl / (n_cl - 1) * (n_rows - 1) / (n_rows - k - p_c), dtype=np.float64)
        return np.asarray(n_rows / (n_rows - k - p_c), dtype=np.float64)

    var = factor(1) * np.einsum("bh,bh->b", mult, s_t * s_t) / (den * den)
    se = np.sqrt(var)
    t = (beta - null) / se
    # Anderson–Rubin: y - b0 x on Z and W
    delta = np.einsum("blk,bk->bl", q, zy - null * zx)
    e_ar = np.zeros((n_b, m))
    e_ar[:, 0] = 1.0
    e_ar[:, 1] = -null
    e_ar[:, 2 : 2 + n_inst] = -delta
    e_ar[:, 2 + n_inst :] = -(g_y - null * g_x - np.einsum("bkl,bl->bk", g_z, delta))
    ar_w = _wald(delta, _scores(cp_flat, f, e_ar), mult, q, factor(n_inst))
    # first stage: x on Z and W
    e_fs = np.zeros((n_b, m))
    e_fs[:, 1] = 1.0
    e_fs[:, 2 : 2 + n_inst] = -pi
    e_fs[:, 2 + n_inst :] = -(g_x - np.einsum("bkl,bl->bk", g_z, pi))
    fs_w = _wald(pi, _scores(cp_flat, f, e_fs), mult, q, factor(n_inst))
    if clustered:
        t_df = n_cl - 1
        ar_df = n_cl - 1
    else:
        t_df = n_rows - 1 - p_c
        ar_df = n_rows - n_inst - p_c
    return BatchStats(
        beta=beta,
        se=se,
        t=t,
        t_df=np.asarray(t_df, dtype=np.float64),
        ar_f=ar_w / n_inst,
        ar_df=np.asarray(ar_df, dtype=np.float64),
        fs_f=fs_w / n_inst,
        pi=pi,
    )


def partialled_stats(
    cols: Array, codes: np.ndarray | None, p: int, nested: int, n_inst: int, null: float
) -> BatchStats:
    """Statistics of already partialled [y, x, Z] columns (no explicit partialled-out columns left)."""
    cl = codes if codes is not None else np.arange(cols.shape[0])
    g = int(cl.max()) + 1
    cp, rows = cluster_crossproducts(cols, cl, g)
    return batch_stats(
        cp,
        rows,
        np.ones((1, g)),
        n_inst=n_inst,
        kw=0,
        p_c=p - nested if codes is not None else p,
        clustered=codes is not None,
        null=null,
    )


def t_p_values(t: Array, df: Array) -> Array:
    """Two-sided p-values of t statistics with t(df) reference distributions."""
    from ivdossier.estimation.distributions import t_sf_array

    return np.asarray(2 * t_sf_array(np.abs(t), df), dtype=np.float64)


def f_p_values(f: Array, q: int, df: Array) -> Array:
    """Upper-tail p-values of F(q, df) statistics."""
    from ivdossier.estimation.distributions import f_sf_array

    return np.asarray(f_sf_array(f, q, df), dtype=np.float64)
