"""Small matrices (K x K, K the ability dimensions) of a batch, elementwise.

Determinants and inverses by cofactors for K <= 3, by an elementwise Cholesky
factorisation beyond; matrix-vector products and quadratic forms with their sums over the
K dimensions in a fixed order.  No LAPACK call (whose blocking may depend on how many
matrices are stacked) and no matrix product across rows: each matrix's result is its own,
so a batch gives bit for bit what one matrix at a time gives.  The decision kernel
(:mod:`adaptive_engine.kernel.multidimensional_state`) and the weighted likelihood of an
ability vector (:mod:`adaptive_engine.irt.multidimensional_estimation`) use them.
"""

from __future__ import annotations

import numpy as np


def determinant(m: np.ndarray) -> np.ndarray:
    """Determinants of matrices (..., K, K): for K <= 3 by cofactors, beyond of symmetric
    positive definite matrices by :func:`cholesky_factor` (the square of the product of its
    diagonal; NaN where the matrix is not positive definite)."""
    k = m.shape[-1]
    if k == 1:
        return m[..., 0, 0].copy()
    if k == 2:
        return m[..., 0, 0] * m[..., 1, 1] - m[..., 0, 1] * m[..., 1, 0]
    if k == 3:
        return (m[..., 0, 0] * (m[..., 1, 1] * m[..., 2, 2] - m[..., 1, 2] * m[..., 2, 1])
                - m[..., 0, 1] * (m[..., 1, 0] * m[..., 2, 2] - m[..., 1, 2] * m[..., 2, 0])
                + m[..., 0, 2] * (m[..., 1, 0] * m[..., 2, 1] - m[..., 1, 1] * m[..., 2, 0]))
    factor = cholesky_factor(m)
    out = factor[..., 0, 0] * factor[..., 0, 0]
    for i in range(1, k):
        out = out * (factor[..., i, i] * factor[..., i, i])
    return out


def inverse(m: np.ndarray) -> np.ndarray:
    """Inverses of matrices (..., K, K): for K <= 3 by the adjugate, beyond of symmetric
    positive definite matrices by :func:`cholesky_inverse` (every matrix the kernel inverts
    for K > 3 is one: a prior covariance or precision, a posterior information)."""
    k = m.shape[-1]
    if k == 1:
        return 1.0 / m
    if k == 2:
        det = determinant(m)
        out = np.empty_like(m)
        out[..., 0, 0] = m[..., 1, 1] / det
        out[..., 1, 1] = m[..., 0, 0] / det
        out[..., 0, 1] = -m[..., 0, 1] / det
        out[..., 1, 0] = -m[..., 1, 0] / det
        return out
    if k == 3:
        det = determinant(m)
        out = np.empty_like(m)
        for i in range(3):
            for j in range(3):
                r = [x for x in range(3) if x != j]
                c = [x for x in range(3) if x != i]
                minor = m[..., r[0], c[0]] * m[..., r[1], c[1]] - m[..., r[0], c[1]] * m[..., r[1], c[0]]
                out[..., i, j] = (-1) ** (i + j) * minor / det
        return out
    return cholesky_inverse(m)


def cholesky_factor(m: np.ndarray) -> np.ndarray:
    """The lower Cholesky factor ``L`` (``m = L L'``) of symmetric positive definite matrices
    (..., K, K), elementwise: each entry by the Cholesky-Banachiewicz recurrence with its
    sums in a fixed order, so every matrix's factor is its own whatever the batch (LAPACK's
    blocked routines promise no such thing).  Only the lower triangle of ``m`` is read; NaN
    where a matrix is not positive definite.
    """
    k = m.shape[-1]
    out = np.zeros(m.shape)
    with np.errstate(invalid="ignore"):
        for j in range(k):
            acc = m[..., j, j]
            for p in range(j):
                acc = acc - out[..., j, p] * out[..., j, p]
            out[..., j, j] = np.sqrt(np.where(acc > 0, acc, np.nan))
            for i in range(j + 1, k):
                acc = m[..., i, j]
                for p in range(j):
                    acc = acc - out[..., i, p] * out[..., j, p]
                out[..., i, j] = acc / out[..., j, j]
    return out


def cholesky_inverse(m: np.ndarray) -> np.ndarray:
    """Inverses of symmetric positive definite matrices (..., K, K), elementwise:
    ``m^-1 = L^-T L^-1`` from :func:`cholesky_factor`, ``L^-1`` by forward substitution,
    every sum in a fixed order; the result is exactly symmetric (the lower triangle is
    computed, the upper copied).  NaN where a matrix is not positive definite.
    """
    k = m.shape[-1]
    factor = cholesky_factor(m)
    low = np.zeros(m.shape)  # L^-1, lower triangular
    for i in range(k):
        low[..., i, i] = 1.0 / factor[..., i, i]
        for j in range(i):
            acc = factor[..., i, j] * low[..., j, j]
            for p in range(j + 1, i):
                acc = acc + factor[..., i, p] * low[..., p, j]
            low[..., i, j] = -acc / factor[..., i, i]
    out = np.empty(m.shape)
    for i in range(k):
        for j in range(i + 1):
            # (L^-T L^-1)_ij = sum_{p >= i} low_pi low_pj
            acc = low[..., i, i] * low[..., i, j]
            for p in range(i + 1, k):
                acc = acc + low[..., p, i] * low[..., p, j]
            out[..., i, j] = acc
            out[..., j, i] = acc
    return out


def quadratic_form(x: np.ndarray, m: np.ndarray) -> np.ndarray:
    """``x' M x`` for vectors (..., K) and matrices broadcasting to (..., K, K), fixed order."""
    k = x.shape[-1]
    out = np.zeros(np.broadcast_shapes(x.shape[:-1], m.shape[:-2]))
    for i in range(k):
        for j in range(k):
            out = out + x[..., i] * m[..., i, j] * x[..., j]
    return out


def matrix_vector(m: np.ndarray, x: np.ndarray) -> np.ndarray:
    """``M x`` for matrices (..., K, K) and vectors (..., K), fixed order."""
    k = x.shape[-1]
    cols = []
    for i in range(k):
        acc = m[..., i, 0] * x[..., 0]
        for j in range(1, k):
            acc = acc + m[..., i, j] * x[..., j]
        cols.append(acc)
    return np.stack(cols, axis=-1)


def solve_positive_real(m: np.ndarray, b: np.ndarray) -> np.ndarray:
    """``m^-1 b`` for matrices (..., K, K) whose symmetric part is positive definite (not
    necessarily symmetric themselves) and vectors (..., K), elementwise: Gaussian
    elimination without pivoting, every sum in a fixed order.  A positive definite
    symmetric part keeps every leading block regular, so no pivot is zero (Golub & Van Loan,
    *Matrix computations*, on LU of such matrices; from memory).  NaN where one is."""
    k = m.shape[-1]
    a = np.array(m, dtype=float, copy=True)
    x = np.array(b, dtype=float, copy=True)
    with np.errstate(divide="ignore", invalid="ignore"):
        for j in range(k):
            pivot = a[..., j, j]
            for i in range(j + 1, k):
                factor = a[..., i, j] / pivot
                for p in range(j + 1, k):
                    a[..., i, p] = a[..., i, p] - factor * a[..., j, p]
                x[..., i] = x[..., i] - factor * x[..., j]
        for i in range(k - 1, -1, -1):
            acc = x[..., i]
            for p in range(i + 1, k):
                acc = acc - a[..., i, p] * x[..., p]
            x[..., i] = acc / a[..., i, i]
    return x
