"""Cell-centred finite volumes on uniform grids with no-flux boundaries.

Every cell carries one unknown at its centre. The flux through an interior face is the two-point
difference ``(u_b - u_a) / distance`` times the face measure; boundary faces carry no flux. With ``M`` the
diagonal of cell measures and ``K`` the sum of face contributions, ``M^-1 K`` is minus the standard 3-point
(1D) or 5-point (2D) Neumann Laplacian, ``K`` is symmetric positive semi-definite and every row and column of
``K`` sums to exactly zero in floating point (see `zero_row_sums`), so totals ``weights @ u`` are conserved
to round-off.
"""

from __future__ import annotations

import operator

import numpy as np
import scipy.sparse as sp

from .records import Discretisation

__all__ = ["interval_fv", "rectangle_fv", "two_point_stiffness", "zero_row_sums"]


def _positive_length(value: float, name: str) -> float:
    """Return ``value`` as a float, or raise if it is not finite and positive."""
    out = float(value)
    if not (np.isfinite(out) and out > 0.0):
        msg = f"`{name}` must be a finite positive length, got {value!r}."
        raise ValueError(msg)
    return out


def _cell_count(value: int, name: str) -> int:
    """Return ``value`` as an int, or raise if it is not an integer >= 2."""
    try:
        out = operator.index(value)
    except TypeError:
        msg = f"`{name}` must be an integer cell count, got {value!r}."
        raise ValueError(msg) from None
    if isinstance(value, bool) or out < 2:
        msg = f"`{name}` must be an integer >= 2, got {value!r}."
        raise ValueError(msg)
    return out


def zero_row_sums(stiffness: sp.spmatrix) -> sp.csr_matrix:
    """Return a symmetric copy of ``stiffness`` whose rows and columns sum to exactly zero in floating point.

    The off-diagonal entries are symmetrised and rounded to a common binary grid, multiples of ``2^(e - b)``
    where ``2^e`` bounds their magnitude and ``b`` leaves enough spare bits that every partial sum of a row is
    exact; the diagonal is then minus the off-diagonal row sum. An entry moves by at most ``2^-b`` of the
    largest one (``b >= 40`` for rows of up to 2^10 entries), far below any discretisation error, and in
    exchange ``K @ 1 == 0`` and ``1 @ K == 0`` hold bit for bit.
    """
    k = sp.csr_matrix(stiffness, dtype=float)
    k = ((k + k.T) * 0.5).tocoo()
    off = k.row != k.col
    rows, cols, vals = k.row[off], k.col[off], k.data[off]
    m = k.shape[0]
    if vals.size == 0:
        return sp.csr_matrix((m, m))
    per_row = int(np.bincount(rows, minlength=m).max())
    spare = int(np.ceil(np.log2(per_row + 2))) + 1
    top = int(np.ceil(np.log2(np.abs(vals).max())))
    quantum = np.ldexp(1.0, top - (52 - spare))
    vals = np.round(vals / quantum) * quantum
    diag = -np.bincount(rows, weights=vals, minlength=m)
    rows = np.concatenate([rows, np.arange(m)])
    cols = np.concatenate([cols, np.arange(m)])
    return sp.csr_matrix((np.concatenate([vals, diag]), (rows, cols)), shape=(m, m))


def two_point_stiffness(m: int, a: np.ndarray, b: np.ndarray, c: np.ndarray | float) -> sp.csr_matrix:
    """Assemble ``K = sum_f c_f (e_a - e_b)(e_a - e_b)^T`` over the faces ``f = (a, b)``.

    Parameters
    ----------
    m : number of cells.
    a, b : ``(f,)`` indices of the two cells of each interior face.
    c : ``(f,)`` or scalar face conductance, face measure over centre distance.

    Returns
    -------
    ``(m, m)`` sparse CSR, symmetric positive semi-definite, with exactly zero row and column sums.
    """
    a = np.asarray(a, dtype=np.int64)
    b = np.asarray(b, dtype=np.int64)
    c = np.broadcast_to(np.asarray(c, dtype=float), a.shape)
    rows = np.concatenate([a, b, a, b])
    cols = np.concatenate([a, b, b, a])
    data = np.concatenate([c, c, -c, -c])
    return zero_row_sums(sp.coo_matrix((data, (rows, cols)), shape=(m, m)))


def interval_fv(length: float, cells: int) -> Discretisation:
    """Finite volumes on ``[0, length]`` with ``cells`` equal cells and no-flux ends.

    ``M^-1 K`` is ``(2u_i - u_{i-1} - u_{i+1}) / h^2`` with mirrored ghost cells, ``h = length / cells``;
    its eigenvalues are ``(2 - 2 cos(n pi / cells)) / h^2``, ``n = 0 .. cells - 1``.
    """
    length = _positive_length(length, "length")
    n = _cell_count(cells, "cells")
    h = length / n
    coords = ((np.arange(n) + 0.5) * h)[:, None]
    weights = np.full(n, h)
    left = np.arange(n - 1)
    stiffness = two_point_stiffness(n, left, left + 1, 1.0 / h)
    return Discretisation(
        coords=coords,
        weights=weights,
        stiffness=stiffness,
        mass=sp.diags(weights, format="csr"),
        lumped=True,
        shape="interval",
        size=(length,),
        method="fv",
        grid=(n,),
    )


def rectangle_fv(lx: float, ly: float, nx: int, ny: int) -> Discretisation:
    """Finite volumes on ``[0, lx] x [0, ly]`` with ``nx x ny`` equal cells and no-flux walls.

    Cell ``(i, j)`` (centre ``((i + 1/2) hx, (j + 1/2) hy)``) is node ``i * ny + j``. ``M^-1 K`` is the
    5-point Neumann Laplacian; its eigenvalues are the sums of the 1D ones in each direction.
    """
    lx = _positive_length(lx, "lx")
    ly = _positive_length(ly, "ly")
    nx = _cell_count(nx, "nx")
    ny = _cell_count(ny, "ny")
    hx, hy = lx / nx, ly / ny
    xs = (np.arange(nx) + 0.5) * hx
    ys = (np.arange(ny) + 0.5) * hy
    gx, gy = np.meshgrid(xs, ys, indexing="ij")
    coords = np.column_stack([gx.ravel(), gy.ravel()])
    m = nx * ny
    weights = np.full(m, hx * hy)
    idx = np.arange(m).reshape(nx, ny)
    # step: faces normal to x (conductance hy / hx), then faces normal to y (hx / hy)
    a = np.concatenate([idx[:-1, :].ravel(), idx[:, :-1].ravel()])
    b = np.concatenate([idx[1:, :].ravel(), idx[:, 1:].ravel()])
    c = np.concatenate([np.full((nx - 1) * ny, hy / hx), np.full(nx * (ny - 1), hx / hy)])
    return Discretisation(
        coords=coords,
        weights=weights,
        stiffness=two_point_stiffness(m, a, b, c),
        mass=sp.diags(weights, format="csr"),
        lumped=True,
        shape="rectangle",
        size=(lx, ly),
        method="fv",
        grid=(nx, ny),
    )
