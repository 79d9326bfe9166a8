"""Small linear-algebra helpers for tall arrays (n rows, few columns).

Products of an n x p array with a small p x m matrix are computed in row blocks: multithreaded BLAS can be
many times slower on such tall-and-skinny shapes than on the same work cut into cache-sized pieces, and block
results need no extra n x m temporary. Projections onto a few columns use the Cholesky factor of the
column-scaled Gram matrix when it is well conditioned, else a Householder QR (the exact fallback).
"""

from __future__ import annotations

from collections.abc import Iterator
from contextlib import contextmanager

import numpy as np
from numpy.typing import NDArray
from threadpoolctl import ThreadpoolController

Array = NDArray[np.float64]
BLOCK_ROWS = 8192
# smallest diagonal element of the Cholesky factor of the unit-diagonal Gram matrix for the fast path:
# above 1e-3 no column has R^2 above 1 - 1e-6 on the columns before it, so cond(Gram) stays near 1e6 at most
GRAM_MIN_DIAG = 1e-3


_CONTROLLER: ThreadpoolController | None = None


@contextmanager
def one_blas_thread() -> Iterator[None]:
    """Run the block in one BLAS thread: on tall, narrow products (n x 4 times 4 x 4) multithreaded BLAS was
    measured 15x slower than one thread on the project's 2-core machines (benchmarks/bench_estimation.py)."""
    global _CONTROLLER
    if _CONTROLLER is None:  # finding the BLAS libraries costs ~20 ms; do it once per process
        _CONTROLLER = ThreadpoolController()
    with _CONTROLLER.limit(limits=1, user_api="blas"):
        yield


def tall_matmul(a: np.ndarray, b: np.ndarray, *, subtract_from: np.ndarray | None = None) -> Array:
    """Return a @ b (or subtract_from - a @ b) for tall a (n x p) and small b (p x m), in row blocks."""
    bm = np.asarray(b, dtype=np.float64)
    vector = bm.ndim == 1
    b2 = bm[:, None] if vector else bm
    n = a.shape[0]
    out = np.empty((n, b2.shape[1]), dtype=np.float64, order="F")
    base = None
    if subtract_from is not None:
        base = np.asarray(subtract_from, dtype=np.float64)
        base = base[:, None] if base.ndim == 1 else base
    for start in range(0, n, BLOCK_ROWS):
        stop = min(start + BLOCK_ROWS, n)
        block = a[start:stop] @ b2
        out[start:stop] = block if base is None else base[start:stop] - block
    return out[:, 0] if vector else out


class Projector:
    """Orthogonal projection onto the columns of a tall matrix z (n x L) of full column rank.

    ``coords(w)`` returns Q'w for an orthonormal basis Q of the column space and ``fitted(c)`` returns Q c,
    so P_z w = fitted(coords(w)). ``exact`` is False when the fast Gram path was used.
    """

    def __init__(self, z: np.ndarray) -> None:
        zm = np.asarray(z, dtype=np.float64)
        self.z = zm[:, None] if zm.ndim == 1 else zm
        norms = np.sqrt(np.einsum("ij,ij->j", self.z, self.z))
        self.scale = 1.0 / np.where(norms > 0, norms, 1.0)
        self.chol: Array | None = None
        self.q: Array | None = None
        gram = (self.z.T @ self.z) * np.outer(self.scale, self.scale)
        try:
            chol = np.linalg.cholesky(gram)
            if np.diag(chol).min() > GRAM_MIN_DIAG:
                self.chol = np.asarray(chol, dtype=np.float64)
        except np.linalg.LinAlgError:
            pass
        if self.chol is None:
            self.q = np.linalg.qr(self.z)[0]
        self.exact = self.chol is None

    def coords(self, w: np.ndarray) -> Array:
        """Q'w (L x p, or L for a vector w)."""
        import scipy.linalg

        if self.q is not None:
            return np.asarray(self.q.T @ w, dtype=np.float64)
        assert self.chol is not None
        zw = self.z.T @ w
        zw = zw * (self.scale if zw.ndim == 1 else self.scale[:, None])
        return np.asarray(scipy.linalg.solve_triangular(self.chol, zw, lower=True, check_finite=False))

    def fitted(self, c: np.ndarray) -> Array:
        """Q c (n x p, or n for a vector c)."""
        import scipy.linalg

        if self.q is not None:
            return tall_matmul(self.q, c)
        assert self.chol is not None
        v = scipy.linalg.solve_triangular(self.chol, c, lower=True, trans="T", check_finite=False)
        v = v * (self.scale if v.ndim == 1 else self.scale[:, None])
        return tall_matmul(self.z, v)

    def residual(self, w: np.ndarray) -> Array:
        """w - P_z w."""
        import scipy.linalg

        c = self.coords(w)
        if self.q is not None:
            return tall_matmul(self.q, c, subtract_from=w)
        assert self.chol is not None
        v = scipy.linalg.solve_triangular(self.chol, c, lower=True, trans="T", check_finite=False)
        v = v * (self.scale if v.ndim == 1 else self.scale[:, None])
        return tall_matmul(self.z, v, subtract_from=w)
