"""Tall-array helpers: block products and projections agree with plain numpy formulas."""

from __future__ import annotations

import numpy as np

from ivdossier.estimation.linalg import BLOCK_ROWS, Projector, tall_matmul


def test_tall_matmul_matches_numpy_across_blocks():
    rng = np.random.default_rng(0)
    a = rng.normal(size=(2 * BLOCK_ROWS + 17, 5))
    b = rng.normal(size=(5, 3))
    base = rng.normal(size=(a.shape[0], 3))
    # source: numpy matmul in one call
    np.testing.assert_allclose(tall_matmul(a, b), a @ b, rtol=1e-13, atol=1e-12)
    np.testing.assert_allclose(tall_matmul(a, b, subtract_from=base), base - a @ b, rtol=1e-13, atol=1e-12)
    np.testing.assert_allclose(tall_matmul(a, b[:, 0]), a @ b[:, 0], rtol=1e-13, atol=1e-12)


def test_projector_fast_and_exact_paths_equal_hat_matrix():
    rng = np.random.default_rng(1)
    n = 300
    z = rng.normal(size=(n, 3))
    w = rng.normal(size=(n, 2))
    # source: the textbook hat matrix Z (Z'Z)^{-1} Z' applied directly
    hat = z @ np.linalg.solve(z.T @ z, z.T @ w)
    fast = Projector(z)
    assert not fast.exact
    np.testing.assert_allclose(fast.fitted(fast.coords(w)), hat, atol=1e-12)
    np.testing.assert_allclose(fast.residual(w), w - hat, atol=1e-12)
    # nearly collinear columns push the Gram route out: the QR path must give the same projection
    z_bad = np.column_stack([z, z[:, 0] + 1e-7 * rng.normal(size=n)])
    slow = Projector(z_bad)
    assert slow.exact
    q, _ = np.linalg.qr(z_bad)
    np.testing.assert_allclose(slow.residual(w), w - q @ (q.T @ w), atol=1e-10)
