"""One generator of the aggregation SQL that the DuckDB and Spark engines run to build the sufficient statistics.

A model over a table becomes three scans (four with an absorbed factor), each a single SQL query (the same
text for both engines, up to identifier quoting):

1. ``counts``: rows, complete rows, infinite values, weight sums and (weighted) column sums, grouped by the
   completeness flag; with one absorbed factor a second scan builds a per-level table of weighted means
   (materialised by the engine) and the nesting of that factor in each cluster variable;
2. ``gram``: the weighted cross-products of the demeaned columns (outcome, treatments, instruments, controls),
   from which the control coefficients are solved (normal equations, as the in-memory path does when the controls
   are well conditioned) together with a first triangular factor R1 of the partialled columns;
3. ``moments``: the partialled, sqrt(w)-scaled columns, already multiplied by R1^{-1} (the first step of
   CholeskyQR2, so the sums are of nearly orthonormal rows), summed as cross-products and, for the robust
   covariance, as products of cross-products (u x u row moments), or grouped by cluster (GROUPING SETS for two
   cluster variables and their intersection) with the per-cluster sums multiplied in a second aggregation level.

The robust covariance needs no further scan after the coefficients: every robust meat of the suite is a linear
function of the row moments sum_i t_i t_i' (t_i the packed products of row i's partialled columns), which scan 3
collects before any coefficient is known; the cluster meats likewise need only the per-cluster sums.

Without an absorbed factor, scan 1 also sums the Gram matrix (around a shift from the first rows), and for the
homoskedastic and one-way clustered covariances it usually replaces scan 3 as well: grouped by cluster, its
per-cluster Gram matrices multiplied by the coefficients give the cluster sums (:func:`cluster_sums_moments`),
one read of the data in all. That product magnifies rounding by the square of :func:`amplification` (the
row-by-row scan 3 by its first power), so above ONE_SCAN_MAX_AMPLIFICATION, or beyond ONE_SCAN_MAX_CLUSTERS
clusters, scan 3 runs as before.

Precision: the control coefficients come from the normal equations of demeaned columns (relative error about
cond(controls)^2 x 1e-16) and the basis is CholeskyQR2 spread over scans 2 and 3, accurate while the partialled
columns' condition number stays below about 1e7; a column that keeps less than SQL_MIN_LENGTH of its length
after partialling is refused (the pandas engine resolves such designs with Householder QR).

:func:`cross_products_from_sums` turns the sums into a :class:`~ivdossier.estimation.crossproducts.CrossProducts`
(via the accumulator's basis change), so every statistic comes from the same code as the in-memory path.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import scipy.linalg
from numpy.typing import NDArray

from ivdossier.errors import EstimationError, InvalidInputError
from ivdossier.estimation.absorb import COLLINEAR_TOL
from ivdossier.estimation.crossproducts import CrossProducts, MomentAccumulator, pack_index

Array = NDArray[np.float64]
# the robust covariance needs u(u+1)/2 row moments (u = m(m+1)/2); beyond this many output columns a query
# is refused (the pandas engine has no such limit)
MAX_SUM_COLUMNS = 5000
# the partialled Gram from the normal equations resolves lengths down to about sqrt(machine epsilon); a column
# that keeps less than this share of its length is refused here (the pandas engine resolves 1e-9)
SQL_MIN_LENGTH = 1e-7
# One-scan cluster moments (:func:`cluster_sums_moments`) multiply each cluster's Gram matrix by the coefficients,
# so their relative rounding error grows with the square of the amplification max_j sum_a |coef_aj| |d_a| (about
# 1 for well-conditioned designs; the row-by-row moments scan grows with its first power): up to this bound the
# error stays near 1e4 x machine epsilon, above it the moments scan runs instead
ONE_SCAN_MAX_AMPLIFICATION = 100.0
# per-cluster sums kept in memory for the one-scan moments (each about 1 KB for 14 columns); more clusters fall
# back to the moments scan, and a centring sample with more distinct clusters than this skips the attempt
ONE_SCAN_MAX_CLUSTERS = 50_000
ONE_SCAN_SAMPLE_MAX_DISTINCT = 5_000


@dataclass(frozen=True)
class Dialect:
    """What differs between the SQL of the two engines (only the quoting of identifiers)."""

    name: str
    quote_char: str

    def quote(self, name: str) -> str:
        """Quote a column name, doubling the quote character inside it."""
        q = self.quote_char
        return q + name.replace(q, q + q) + q


DUCKDB = Dialect("duckdb", '"')
SPARK = Dialect("spark", "`")


def lit(x: float) -> str:
    """A double literal that both engines read as DOUBLE with every digit (scientific notation)."""
    v = float(x)
    if not np.isfinite(v):
        raise EstimationError(f"A non-finite coefficient ({v!r}) reached the SQL generator; check the data.")
    return format(v, ".17e")


@dataclass(frozen=True)
class MomentPlan:
    """What the queries need: the relation, the roles of the columns and the covariance layout.

    ``targets`` are in the order of :class:`CrossProducts` (instruments, treatments, outcome); ``numeric``
    lists every column cast to DOUBLE (targets, controls, weights); ``categorical`` the absorbed factor and the
    cluster variables (used as group keys, never cast).
    """

    relation: str
    instruments: tuple[str, ...]
    treatments: tuple[str, ...]
    outcome: str
    controls: tuple[str, ...]
    absorb: str | None
    clusters: tuple[str, ...]
    weights: str | None
    kind: str
    dialect: Dialect

    @property
    def targets(self) -> tuple[str, ...]:
        """Instruments, treatments and the outcome: the columns of the sufficient statistics."""
        return (*self.instruments, *self.treatments, self.outcome)

    @property
    def demeaned(self) -> tuple[str, ...]:
        """Targets then controls: the columns of the Gram pass."""
        return (*self.targets, *self.controls)

    @property
    def numeric(self) -> tuple[str, ...]:
        """Every column read as a number."""
        return (*self.demeaned, *((self.weights,) if self.weights else ()))

    def q(self, name: str) -> str:
        """Quoted identifier."""
        return self.dialect.quote(name)

    def num(self, name: str) -> str:
        """A column as DOUBLE."""
        return f"CAST({self.q(name)} AS DOUBLE)"

    def complete(self) -> str:
        """The listwise-deletion predicate over the cast columns of :func:`rows_query` (NaN counts as missing)."""
        names = [_alias("v", j) for j in range(len(self.demeaned))] + (["ivd_w"] if self.weights else [])
        parts = [f"({v} IS NOT NULL AND NOT isnan({v}))" for v in names]
        parts += ["ivd_f IS NOT NULL"] if self.absorb else []
        parts += [f"{_alias('c', j)} IS NOT NULL" for j in range(len(self.clusters))]
        return " AND ".join(parts)


def _alias(prefix: str, j: int) -> str:
    return f"ivd_{prefix}{j}"


def rows_query(plan: MomentPlan) -> str:
    """Every used column once: numbers cast to DOUBLE (``ivd_v{j}``, weight ``ivd_w``), the absorbed factor
    (``ivd_f``), the cluster keys (``ivd_c{j}``) and the completeness flag ``ivd_ok``."""
    sel = [f"{plan.num(c)} AS {_alias('v', j)}" for j, c in enumerate(plan.demeaned)]
    sel.append(f"{plan.num(plan.weights) if plan.weights else '1.0e+00'} AS ivd_w")
    if plan.absorb:
        sel.append(f"{plan.q(plan.absorb)} AS ivd_f")
    sel += [f"{plan.q(c)} AS {_alias('c', j)}" for j, c in enumerate(plan.clusters)]
    cast = f"SELECT {', '.join(sel)} FROM {plan.relation}"
    return f"SELECT ivd_cast.*, ({plan.complete()}) AS ivd_ok FROM ({cast}) ivd_cast"


def sample_means_query(plan: MomentPlan, rows: int = 10000, *, distinct_clusters: bool = False) -> str:
    """Means of the first complete rows (a few row groups, not a scan): the shift that keeps the one-scan Gram
    matrix free of cancellation when no factor is absorbed; with ``distinct_clusters`` also the number of
    distinct values of the first cluster variable among them (``ivd_distinct``)."""
    sel = [f"avg({_alias('v', j)}) AS {_alias('a', j)}" for j in range(len(plan.demeaned))]
    if distinct_clusters:
        sel.append(f"count(DISTINCT {_alias('c', 0)}) AS ivd_distinct")
    return f"SELECT {', '.join(sel)} FROM (SELECT * FROM ({rows_query(plan)}) ivd_r WHERE ivd_ok LIMIT {int(rows)}) ivd_s"


def counts_query(plan: MomentPlan, shift: Sequence[float] | None = None, *, by_cluster: bool = False) -> str:
    """Scan 1, one row per value of the completeness flag (grouping is cheaper than filtered aggregates): rows,
    infinite values, bad weights, instrument ranges and weighted sums. With ``shift`` (no
    absorbed factor) also the weighted sums ``ivd_h{j}`` and cross-products ``ivd_g{i}`` of v - shift, from
    which the centred Gram matrix follows exactly (G - h h' / W), so no separate Gram scan is needed.

    ``by_cluster`` (with ``shift`` and one cluster variable) groups by the cluster key as well: one row per
    cluster (and completeness flag), whose sums give both the Gram matrix and, once the coefficients are known,
    the cluster moments (:func:`cluster_sums_moments`), so the moments scan is not needed."""
    n_d = len(plan.demeaned)
    if by_cluster and (shift is None or len(plan.clusters) != 1):
        raise InvalidInputError(
            "counts_query(by_cluster=True) needs a shift and exactly one cluster variable."
        )
    sel = ["ivd_ok", "count(*) AS ivd_rows"]
    if shift is None or plan.weights:
        # without a shift (or with weights, whose missing values hide a row's other values from the sums)
        # infinite values are counted here; otherwise a non-finite sum calls :func:`infinite_counts_query`
        sel += _infinite_counts(plan)
    sel.append("sum(ivd_w) AS ivd_wsum")
    if plan.weights:
        sel.append("sum(CASE WHEN ivd_w <= 0.0e+00 THEN 1 ELSE 0 END) AS ivd_badw")
    if shift is None:  # with a shift the means follow from the sums h of v - shift
        sel += [f"sum(ivd_w * {_alias('v', j)}) AS {_alias('s', j)}" for j in range(n_d)]
    for j in range(len(plan.instruments)):
        sel.append(f"min({_alias('v', j)}) AS {_alias('lo', j)}")
        sel.append(f"max({_alias('v', j)}) AS {_alias('hi', j)}")
    # clusters are counted by the moments scan, which groups by them anyway
    src = f"({rows_query(plan)}) ivd_r"
    if shift is not None:
        if plan.absorb is not None:
            raise InvalidInputError("The one-scan Gram matrix applies without an absorbed factor only.")
        sw = "sqrt(ivd_w) * " if plan.weights else ""
        hs = [f"{sw}({_alias('v', j)} - {lit(mu)}) AS {_alias('x', j)}" for j, mu in enumerate(shift)]
        src = f"(SELECT ivd_r.*, {', '.join(hs)} FROM {src}) ivd_r"
        x = [_alias("x", j) for j in range(n_d)]
        hw = "sqrt(ivd_w) * " if plan.weights else ""
        sel += [f"sum({hw}{x[j]}) AS {_alias('h', j)}" for j in range(n_d)]
        sel += [
            f"sum({x[a]} * {x[b]}) AS {_alias('g', i)}"
            for i, (a, b) in enumerate(zip(*pack_index(n_d), strict=True))
        ]
    group = f"ivd_ok, {_alias('c', 0)}" if by_cluster else "ivd_ok"
    return f"SELECT {', '.join(sel)} FROM {src} GROUP BY {group}"


def _infinite_counts(plan: MomentPlan) -> list[str]:
    inf = "CAST('Infinity' AS DOUBLE)"
    values = [_alias("v", j) for j in range(len(plan.demeaned))] + (["ivd_w"] if plan.weights else [])
    return [
        f"sum(CASE WHEN abs({v}) = {inf} THEN 1 ELSE 0 END) AS {_alias('inf', j)}"
        for j, v in enumerate(values)
    ]


def infinite_counts_query(plan: MomentPlan) -> str:
    """Infinite values per numeric column over every row (run only when a sum of scan 1 is not finite)."""
    return f"SELECT {', '.join(_infinite_counts(plan))} FROM ({rows_query(plan)}) ivd_r"


def level_means_query(plan: MomentPlan) -> str:
    """Per level of the absorbed factor: weight sum, weighted means and whether the level sits in one cluster."""
    if plan.absorb is None:
        raise InvalidInputError("level_means_query needs an absorbed factor.")
    sel = ["ivd_f AS ivd_level", "sum(ivd_w) AS ivd_lw"]
    sel += [
        f"sum(ivd_w * {_alias('v', j)}) / sum(ivd_w) AS {_alias('m', j)}" for j in range(len(plan.demeaned))
    ]
    for j in range(len(plan.clusters)):
        c = _alias("c", j)
        sel.append(f"CASE WHEN min({c}) = max({c}) THEN 1 ELSE 0 END AS {_alias('nest', j)}")
    return f"SELECT {', '.join(sel)} FROM ({rows_query(plan)}) ivd_r WHERE ivd_ok GROUP BY ivd_f"


def levels_summary_query(plan: MomentPlan, means_table: str) -> str:
    """Number of levels of the absorbed factor and, per cluster variable, the levels not nested in it."""
    sel = ["count(*) AS ivd_levels"] + [
        f"sum(1 - {_alias('nest', j)}) AS {_alias('notnested', j)}" for j in range(len(plan.clusters))
    ]
    return f"SELECT {', '.join(sel)} FROM {means_table}"


def _demeaned_query(plan: MomentPlan, means: Sequence[float] | None, means_table: str | None) -> str:
    """Complete rows as sqrt(w) * (value - mean): ``ivd_d{j}`` around the global means (no absorbed factor) or
    the level means (by a join), ``ivd_e{j}`` around the global means when a factor is absorbed; cluster keys."""
    n_d = len(plan.demeaned)
    keys = [f"ivd_r.{_alias('c', j)}" for j in range(len(plan.clusters))]
    if means is None:
        raise InvalidInputError("The global means (scan 1) are needed by the later scans.")
    centred = [f"ivd_sw * (ivd_r.{_alias('v', j)} - {lit(means[j])})" for j in range(n_d)]
    if plan.absorb is None:
        sel = [f"{e} AS {_alias('d', j)}" for j, e in enumerate(centred)]
        src = f"({rows_query(plan)}) ivd_r"
    else:
        if means_table is None:
            raise InvalidInputError("A level-means table is needed when a factor is absorbed.")
        sel = [
            f"ivd_sw * (ivd_r.{_alias('v', j)} - ivd_lm.{_alias('m', j)}) AS {_alias('d', j)}"
            for j in range(n_d)
        ]
        sel += [f"{e} AS {_alias('e', j)}" for j, e in enumerate(centred)]
        src = f"({rows_query(plan)}) ivd_r JOIN {means_table} ivd_lm ON ivd_r.ivd_f = ivd_lm.ivd_level"
    sw = "sqrt(ivd_r.ivd_w)" if plan.weights else "1.0e+00"
    sel = [s.replace("ivd_sw * ", f"{sw} * " if plan.weights else "") for s in sel]
    sel += keys
    return f"SELECT {', '.join(sel)} FROM {src} WHERE ivd_r.ivd_ok"


def gram_query(
    plan: MomentPlan, *, means: Sequence[float] | None = None, means_table: str | None = None
) -> str:
    """Scan 2: cross-products of the sqrt(w)-scaled demeaned targets and controls (and, with an absorbed factor,
    the squares around the global means, which give each column's length before absorbing)."""
    n_d = len(plan.demeaned)
    d = [_alias("d", j) for j in range(n_d)]
    sel = [
        f"sum({d[a]} * {d[b]}) AS {_alias('g', i)}"
        for i, (a, b) in enumerate(zip(*pack_index(n_d), strict=True))
    ]
    if plan.absorb is not None:
        sel += [f"sum({_alias('e', j)} * {_alias('e', j)}) AS {_alias('pre', j)}" for j in range(n_d)]
    return f"SELECT {', '.join(sel)} FROM ({_demeaned_query(plan, means, means_table)}) ivd_d"


def moments_query(
    plan: MomentPlan, coef: Array, *, means: Sequence[float] | None = None, means_table: str | None = None
) -> str:
    """Scan 3: sums over rows (or clusters) of the products of the columns d @ coef (d already sqrt(w)-scaled).

    Output columns: ``ivd_n`` (rows), ``ivd_t{i}`` (the packed Gram), and for robust ``ivd_k{i}`` (packed
    u x u row moments); for clusters one row per dimension (``ivd_dim``: 0, 1, then 2 for the intersection)
    with ``ivd_groups`` and the packed sums of t_g t_g'.
    """
    m = coef.shape[1]
    u = m * (m + 1) // 2
    n_k = u * (u + 1) // 2 if plan.kind != "homoskedastic" else 0
    if u + n_k > MAX_SUM_COLUMNS:
        raise EstimationError(
            f"The {plan.kind} covariance of {m} columns needs {u + n_k} sums per scan, more than the SQL engines "
            f"build ({MAX_SUM_COLUMNS}); use engine='pandas' (in memory) or fewer instruments."
        )
    d = [_alias("d", j) for j in range(coef.shape[0])]
    cols = []
    for j in range(m):
        terms = [f"{lit(coef[a, j])} * {d[a]}" for a in range(coef.shape[0]) if coef[a, j] != 0.0]
        cols.append(" + ".join(terms) if terms else "0.0e+00")
    ia, ib = pack_index(m)
    ka, kb = pack_index(u)
    ckeys = [_alias("c", j) for j in range(len(plan.clusters))]
    inner_sel = [f"{cols[j]} AS {_alias('b', j)}" for j in range(m)] + ckeys
    base = f"SELECT {', '.join(inner_sel)} FROM ({_demeaned_query(plan, means, means_table)}) ivd_d"
    prods = [f"{_alias('b', a)} * {_alias('b', b)}" for a, b in zip(ia, ib, strict=True)]
    if plan.kind == "homoskedastic":
        sel = ["count(*) AS ivd_n"] + [f"sum({p}) AS {_alias('t', i)}" for i, p in enumerate(prods)]
        return f"SELECT {', '.join(sel)} FROM ({base}) ivd_b"
    if plan.kind == "heteroskedastic":
        tsel = [f"{p} AS {_alias('p', i)}" for i, p in enumerate(prods)]
        sel = ["count(*) AS ivd_n"] + [f"sum({_alias('p', i)}) AS {_alias('t', i)}" for i in range(u)]
        sel += [
            f"sum({_alias('p', a)} * {_alias('p', b)}) AS {_alias('k', i)}"
            for i, (a, b) in enumerate(zip(ka, kb, strict=True))
        ]
        return f"SELECT {', '.join(sel)} FROM (SELECT {', '.join(tsel)} FROM ({base}) ivd_b) ivd_p"
    if plan.kind != "clustered" or not plan.clusters:
        raise InvalidInputError(f"Unknown covariance layout {plan.kind!r} for the moments query.")
    gsel = ["count(*) AS ivd_rows"] + [f"sum({p}) AS {_alias('t', i)}" for i, p in enumerate(prods)]
    if len(ckeys) == 1:
        gsel.insert(0, "0 AS ivd_dim")
        group = f"GROUP BY {ckeys[0]}"
    else:
        a, b = ckeys
        # grouping(col) is 1 when col is aggregated away: (a): 0,1 -> dim 0; (b): 1,0 -> dim 1; (a, b): dim 2
        gsel.insert(
            0,
            f"CASE WHEN grouping({a}) = 0 AND grouping({b}) = 1 THEN 0 "
            f"WHEN grouping({a}) = 1 THEN 1 ELSE 2 END AS ivd_dim",
        )
        group = f"GROUP BY GROUPING SETS (({a}), ({b}), ({a}, {b}))"
    grouped = f"SELECT {', '.join(gsel)} FROM ({base}) ivd_b {group}"
    sel = ["ivd_dim", "count(*) AS ivd_groups", "sum(ivd_rows) AS ivd_n"]
    sel += [f"sum({_alias('t', i)}) AS {_alias('t', i)}" for i in range(u)]
    sel += [
        f"sum({_alias('t', a)} * {_alias('t', b)}) AS {_alias('k', i)}"
        for i, (a, b) in enumerate(zip(ka, kb, strict=True))
    ]
    return f"SELECT {', '.join(sel)} FROM ({grouped}) ivd_g GROUP BY ivd_dim ORDER BY ivd_dim"


def raw_summary_query(plan: MomentPlan, columns: Sequence[int], split: int | None = None) -> str:
    """Unweighted row counts, means and sample variances (ddof = 1) of the given numeric columns (positions in
    ``plan.demeaned``) over the complete rows; with ``split`` grouped by whether that column is 0, 1 or another
    value (``ivd_arm`` 0, 1, 2), for the standardised differences of one binary instrument."""
    sel = ["count(*) AS ivd_n"]
    for j in columns:
        v = _alias("v", j)
        sel += [f"avg({v}) AS {_alias('mean', j)}", f"var_samp({v}) AS {_alias('var', j)}"]
    src = f"FROM ({rows_query(plan)}) ivd_r WHERE ivd_ok"
    if split is None:
        return f"SELECT 0 AS ivd_arm, {', '.join(sel)} {src}"
    v = _alias("v", split)
    arm = f"CASE WHEN {v} = 0.0e+00 THEN 0 WHEN {v} = 1.0e+00 THEN 1 ELSE 2 END"
    return f"SELECT {arm} AS ivd_arm, {', '.join(sel)} {src} GROUP BY {arm}"


def amplification(coef: Array, gram: Array) -> float:
    """max_j sum_a |coef_aj| |d_a| (|d_a| from the Gram diagonal): how much rounding in sums of the columns d is
    magnified in those of d @ coef (whose columns have length about 1)."""
    lengths = np.sqrt(np.clip(np.diag(gram), 0.0, None))
    return float(np.max(np.abs(coef).T @ lengths))


@dataclass(frozen=True)
class ClusterSums:
    """Per-cluster sums of scan 1 grouped by cluster (complete rows, v - shift scaled by sqrt(w)): weight sums,
    the sums ``h`` and the packed cross-products ``g`` (one row per cluster)."""

    wsum: Array
    h: Array
    g: Array


def cluster_sums_moments(sums: ClusterSums, delta: Array, coef: Array) -> tuple[Array, Array]:
    """The moments scan's clustered sums from scan 1's per-cluster sums: the packed Gram of b = d @ coef and the
    packed sums of t_g t_g' (t_g the packed Gram of cluster g's rows of b).

    Cluster g's Gram of the columns centred at the global means (d = x - sqrt(w) delta, x = sqrt(w)(v - shift),
    delta = means - shift) is G_g - h_g delta' - delta h_g' + W_g delta delta'; then t_g = coef' D_g coef.
    """
    n_d, m = coef.shape
    ia, ib = pack_index(n_d)
    ta, tb = pack_index(m)
    ka, kb = pack_index(m * (m + 1) // 2)
    u = m * (m + 1) // 2
    total = np.zeros(u)
    outer = np.zeros(len(ka))
    step = 4096
    for start in range(0, sums.g.shape[0], step):
        g = sums.g[start : start + step]
        h = sums.h[start : start + step]
        w = sums.wsum[start : start + step]
        d = np.zeros((g.shape[0], n_d, n_d))
        d[:, ia, ib] = g
        d[:, ib, ia] = g
        hd = h[:, :, None] * delta[None, None, :]
        d -= hd + hd.transpose(0, 2, 1)
        d += w[:, None, None] * np.outer(delta, delta)[None, :, :]
        t = np.einsum("aj,gab,bk->gjk", coef, d, coef, optimize=True)[:, ta, tb]
        total += t.sum(axis=0)
        outer += np.einsum("gi,gi->i", t[:, ka], t[:, kb])
    return total, outer


def unpack(values: Sequence[float], size: int) -> Array:
    """A symmetric size x size matrix from its upper triangle packed row by row (pack_index order)."""
    out = np.zeros((size, size))
    ia, ib = pack_index(size)
    out[ia, ib] = np.asarray(values, dtype=np.float64)
    out[ib, ia] = out[ia, ib]
    return out


def packed(row: Mapping[str, object], prefix: str, count: int) -> list[float]:
    """Values ``ivd_{prefix}0..count-1`` of a result row as floats (NULL sums of no rows become 0)."""
    out = []
    for i in range(count):
        v = row[_alias(prefix, i)]
        out.append(0.0 if v is None else float(v))  # type: ignore[arg-type]
    return out


def ordered_rank_screen(gram: Array, tol: float) -> list[int]:
    """Columns (in order) whose part orthogonal to the earlier kept columns is at most ``tol`` of their length.

    The Gram-matrix form of a QR factorisation in the given column order: the same columns are flagged as by
    the in-memory path's QR (the later of two redundant columns).
    """
    size = gram.shape[0]
    norms = np.sqrt(np.clip(np.diag(gram), 0.0, None))
    bad: list[int] = []
    kept: list[int] = []
    for j in range(size):
        if norms[j] == 0.0:
            bad.append(j)
            continue
        if kept:
            sub = gram[np.ix_(kept, kept)]
            v = gram[kept, j]
            resid2 = gram[j, j] - v @ np.linalg.solve(sub, v)
        else:
            resid2 = gram[j, j]
        if resid2 <= (tol * norms[j]) ** 2:
            bad.append(j)
        else:
            kept.append(j)
    return bad


@dataclass(frozen=True)
class Partialling:
    """The control coefficients and the first triangular factor, solved from the Gram scan."""

    coef: Array  # (targets + controls) x targets: demeaned columns @ coef = partialled targets
    schur: Array  # the partialled targets' Gram matrix from the normal equations
    approx_len: Array  # each target's length after partialling, from the normal equations
    dropped_controls: tuple[int, ...]


def solve_partialling(gram: Array, pre: Array, n_targets: int) -> Partialling:
    """Control coefficients from the Gram of [targets, controls] and a first R factor of the partialled targets."""
    p = n_targets
    k_c = gram.shape[0] - p
    dropped: list[int] = []
    coef_c = np.zeros((k_c, p))
    if k_c:
        gcc = gram[p:, p:]
        after = np.sqrt(np.clip(np.diag(gcc), 0.0, None))
        alive = [j for j in range(k_c) if after[j] > COLLINEAR_TOL * pre[p + j] and pre[p + j] > 0]
        dropped = [j for j in range(k_c) if j not in alive]
        if alive:
            sub = gcc[np.ix_(alive, alive)]
            bad = ordered_rank_screen(sub, COLLINEAR_TOL)
            dropped += [alive[i] for i in bad]
            alive = [a for i, a in enumerate(alive) if i not in bad]
        if alive:
            idx = np.asarray(alive)
            inv = 1.0 / after[idx]
            scaled = gcc[np.ix_(idx, idx)] * np.outer(inv, inv)
            sol = scipy.linalg.solve(scaled, gram[p:, :p][idx] * inv[:, None], assume_a="pos")
            coef_c[idx] = sol * inv[:, None]
    schur = gram[:p, :p] - gram[:p, p:] @ coef_c
    schur = (schur + schur.T) / 2
    approx = np.sqrt(np.clip(np.diag(schur), 0.0, None))
    coef = np.vstack([np.eye(p), -coef_c])
    return Partialling(coef, schur, approx, tuple(sorted(dropped)))


def first_factor(schur_len: Array, schur: Array) -> Array:
    """R1 D1 (upper triangular) with R1 the Cholesky factor of the unit-diagonal partialled Gram matrix."""
    d1 = np.where(schur_len > 0, schur_len, 1.0)
    unit = schur / np.outer(d1, d1)
    r1 = np.linalg.cholesky((unit + unit.T) / 2).T
    return np.asarray(r1 * d1[None, :], dtype=np.float64)


def cross_products_from_sums(
    *,
    k: int,
    p: int,
    has_y: bool,
    r1_scaled: Array,
    n: int,
    gram_sums: Sequence[float],
    moment_sums: Sequence[Sequence[float]],
    n_groups: Sequence[int],
    kind: str,
    small_sample: bool,
    n_partialled: int,
    n_partialled_nested: int,
) -> CrossProducts:
    """The sufficient statistics from scan 3's sums of rows b = partialled @ (R1 D1)^{-1} (nearly orthonormal).

    The Gram G2 of those rows gives R2 (second CholeskyQR2 step); the partialled columns are then Q R2 R1 D1,
    so ``scale`` and the unit-length R follow, and the row or cluster moments are mapped to the orthonormal basis
    by :meth:`MomentAccumulator.finish` with R2^{-1}.
    """
    m = k + p + int(has_y)
    g2 = unpack(gram_sums, m)
    try:
        r2 = np.linalg.cholesky(g2).T
    except np.linalg.LinAlgError as exc:
        raise EstimationError(
            "The partialled instruments, treatments and outcome are collinear (their cross-product matrix is "
            "not positive definite); drop the redundant column or use engine='pandas' to have it named."
        ) from exc
    full = r2 @ r1_scaled
    scale = np.sqrt(np.einsum("ij,ij->j", full, full))
    r = full / np.where(scale > 0, scale, 1.0)[None, :]
    r2inv = scipy.linalg.solve_triangular(r2, np.eye(m), check_finite=False)
    moments: list[Array] = []
    u = m * (m + 1) // 2
    for sums in moment_sums:
        acc = MomentAccumulator(m, 0, n, g2.copy(), unpack(sums, u))
        (mom,), _ = acc.finish(basis_inv=r2inv)
        moments.append(mom)
    return CrossProducts(
        n=n,
        k=k,
        p=p,
        has_y=has_y,
        r=np.asarray(r, dtype=np.float64),
        scale=np.asarray(scale, dtype=np.float64),
        kind=kind,
        small_sample=small_sample,
        moments=tuple(moments),
        n_groups=tuple(int(g) for g in n_groups) if kind == "clustered" else (),
        n_partialled=n_partialled,
        n_partialled_nested=n_partialled_nested,
        exact_basis=False,
    )
