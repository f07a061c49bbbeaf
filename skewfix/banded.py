"""Banded normal equations for the motion fit, in NumPy alone.

Every track constrains the motion curves only near its two times, so in a
knot-major ordering of the unknowns (knot 0 of every curve, then knot 1, ...)
the matrix J^T W J of the Gauss-Newton step is a band a few knots wide. It is
built from one dense block per run of consecutive knots (the sum over the tracks
that start at that knot, one matrix product each) and solved by block
tridiagonal elimination, which is Cholesky's method by blocks for a symmetric
positive definite matrix (Golub & Van Loan, *Matrix Computations*, 4th ed.,
§4.5.1, "block tridiagonal systems").

Compared with a general sparse product and solver this does the same
arithmetic in a few dense products, and it needs no SciPy: the fit's first
frame does not wait for an import of the sparse modules.
"""

from __future__ import annotations

import numpy as np


class BandedSystem:
    """A symmetric matrix of order ``size`` with entries only within ``half_width`` of the
    diagonal, stored by rows and diagonals (``band[i, j - i + half_width]``)."""

    def __init__(self, size: int, half_width: int):
        self.size, self.half_width = int(size), int(half_width)
        self.band = np.zeros((self.size, 2 * self.half_width + 1))

    def copy(self) -> "BandedSystem":
        twin = BandedSystem.__new__(BandedSystem)
        twin.size, twin.half_width, twin.band = self.size, self.half_width, self.band.copy()
        return twin

    def add_entries(self, rows, cols, values) -> None:
        """Add ``values`` at (rows, cols); repeated positions are summed."""
        rows, cols = np.asarray(rows, dtype=np.int64), np.asarray(cols, dtype=np.int64)
        offset = cols - rows + self.half_width
        if np.any((offset < 0) | (offset > 2 * self.half_width)):
            raise ValueError("an entry lies outside the band")
        width = 2 * self.half_width + 1
        self.band += np.bincount((rows * width + offset).ravel(), weights=np.ravel(values),
                                 minlength=self.band.size).reshape(self.band.shape)

    def add_blocks(self, starts, blocks) -> None:
        """Add dense square blocks ``blocks[g]`` whose first row and column is ``starts[g]``."""
        blocks = np.asarray(blocks, dtype=np.float64)
        size = blocks.shape[1]
        if size - 1 > self.half_width:
            raise ValueError("a block is wider than the band")
        i, j = np.meshgrid(np.arange(size), np.arange(size), indexing="ij")
        starts = np.asarray(starts, dtype=np.int64)[:, None, None]
        inside = (starts + np.maximum(i, j)) < self.size
        blocks = np.where(inside, blocks, 0.0)
        rows = np.minimum(starts + i, self.size - 1)
        cols = np.minimum(starts + j, self.size - 1)
        cols = np.where(inside, cols, rows)  # the zeros outside land on the diagonal
        self.add_entries(rows, cols, blocks)

    def add_diagonal(self, values) -> None:
        self.band[:, self.half_width] += values

    def solve(self, rhs: np.ndarray) -> np.ndarray:
        """The solution of (matrix) x = rhs, for a vector or a matrix of right-hand sides.

        The order is cut into blocks at least as wide as the band, so each couples only to
        its neighbours, and block Gaussian elimination (no pivoting between blocks, stable
        for a positive definite matrix) runs down and back up the blocks."""
        rhs = np.asarray(rhs, dtype=np.float64)
        vector = rhs.ndim == 1
        r = rhs.reshape(self.size, -1)
        b = max(self.half_width + 1, 32)
        nb = -(-self.size // b)
        n = nb * b
        # the band as dense (b x 2b) strips: rows of block i, columns of blocks i and i + 1
        h, width = self.half_width, 2 * self.half_width + 1
        band = np.zeros((n, width))
        band[: self.size] = self.band
        band[self.size:, h] = 1.0  # padding: identity rows
        a = np.arange(b)[:, None]
        c = np.arange(2 * b)[None, :]
        offset = c - a + h
        valid = (offset >= 0) & (offset < width)
        strips = np.where(valid, band.reshape(nb, b, width)[:, a, np.clip(offset, 0, width - 1)], 0.0)
        diag, upper = strips[:, :, :b], strips[:, :, b:]
        y = np.zeros((n, r.shape[1]))
        y[: self.size] = r
        y = y.reshape(nb, b, -1)
        pivots = np.empty_like(diag)
        pivots[0] = diag[0]
        for i in range(1, nb):
            lower = upper[i - 1].T
            factor = np.linalg.solve(pivots[i - 1].T, lower.T).T  # lower @ inv(pivot)
            pivots[i] = diag[i] - factor @ upper[i - 1]
            y[i] = y[i] - factor @ y[i - 1]
        x = np.empty_like(y)
        x[-1] = np.linalg.solve(pivots[-1], y[-1])
        for i in range(nb - 2, -1, -1):
            x[i] = np.linalg.solve(pivots[i], y[i] - upper[i] @ x[i + 1])
        x = x.reshape(n, -1)[: self.size]
        return x[:, 0] if vector else x


def grouped_gram(local: np.ndarray, starts: np.ndarray, weights: np.ndarray, resid: np.ndarray | None = None):
    """Sums of weighted outer products of local rows, one per distinct start.

    ``local`` (n, m, L): each observation's m residual rows over L consecutive unknowns
    beginning at ``starts[i]``; ``weights`` (n,); ``resid`` (n, m). Returns the distinct
    starts, the (g, L, L) blocks of sum w v v^T, and, with ``resid``, the (g, L) vectors of
    sum w v r."""
    order = np.argsort(starts, kind="stable")
    s = starts[order]
    bounds = np.flatnonzero(np.diff(s)) + 1
    first = np.concatenate([[0], bounds])
    last = np.concatenate([bounds, [len(s)]])
    n, m, width = local.shape
    v = local[order].reshape(n, m, width)
    wv = v * weights[order][:, None, None]
    blocks = np.empty((len(first), width, width))
    vectors = np.empty((len(first), width)) if resid is not None else None
    r = resid[order] if resid is not None else None
    for g, (a, b) in enumerate(zip(first, last)):
        rows = v[a:b].reshape(-1, width)
        wrows = wv[a:b].reshape(-1, width)
        blocks[g] = wrows.T @ rows
        if r is not None:
            vectors[g] = wrows.T @ r[a:b].reshape(-1)
    return s[first], blocks, vectors


def scatter_vector(size: int, starts: np.ndarray, vectors: np.ndarray) -> np.ndarray:
    """A vector of order ``size`` holding the sum of ``vectors[g]`` placed at ``starts[g]``
    (parts past the end are dropped; they multiply unknowns that do not exist)."""
    width = vectors.shape[1]
    idx = starts[:, None] + np.arange(width)[None, :]
    inside = idx < size
    return np.bincount(idx[inside], weights=vectors[inside], minlength=size)
