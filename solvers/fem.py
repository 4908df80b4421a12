"""P1 finite elements through scikit-fem on intervals, rectangles and disks, with no-flux boundaries.

The natural (Neumann) boundary condition needs no boundary terms: ``K`` is the assembled Laplace form
and ``M`` the mass form over the whole mesh. With ``lumped=True`` (the default) ``M`` is row-sum lumped,
a diagonal whose entries are the integrals of the hat functions, so ``weights @ u`` is the exact
integral of the P1 interpolant of ``u`` and is kept by a conservative stepper to round-off. ``K`` goes
through `solvers.grids.zero_row_sums`, so ``K @ 1 == 0`` holds bit for bit.

`make_discretisation` builds any supported (shape, method) pair from a registry.
"""

from __future__ import annotations

import math
import operator
from collections.abc import Callable, Sequence
from dataclasses import replace

import numpy as np
import scipy.sparse as sp
from skfem import Basis, BilinearForm, ElementLineP1, ElementTriP1, MeshLine, MeshTri, asm
from skfem.helpers import dot, grad

from .grids import _cell_count, _positive_length, interval_fv, rectangle_fv, zero_row_sums
from .records import Discretisation

__all__ = [
    "DISCRETISATIONS",
    "disk_level",
    "disk_node_count",
    "disk_p1",
    "interval_p1",
    "make_discretisation",
    "rectangle_p1",
]


@BilinearForm
def laplace(u, v, _):
    """Stiffness form ``(grad u, grad v)``."""
    return dot(grad(u), grad(v))


@BilinearForm
def mass(u, v, _):
    """Mass form ``(u, v)``."""
    return u * v


def _from_mesh(mesh, element, shape: str, size: tuple[float, ...], lumped: bool) -> Discretisation:
    """Assemble ``K`` and ``M`` once on ``mesh`` and wrap them with the lumped weights."""
    basis = Basis(mesh, element)
    stiffness = zero_row_sums(asm(laplace, basis))
    consistent = asm(mass, basis).tocsr()
    weights = np.asarray(consistent.sum(axis=1)).ravel()
    return Discretisation(
        coords=np.ascontiguousarray(mesh.p.T),
        weights=weights,
        stiffness=stiffness,
        mass=sp.diags(weights, format="csr") if lumped else consistent,
        lumped=bool(lumped),
        shape=shape,
        size=size,
        method="p1",
        grid=None,
    )


def interval_p1(length: float, cells: int, lumped: bool = True) -> Discretisation:
    """P1 elements on ``[0, length]`` with ``cells`` equal elements (``cells + 1`` nodes)."""
    length = _positive_length(length, "length")
    cells = _cell_count(cells, "cells")
    mesh = MeshLine.init_tensor(np.linspace(0.0, length, cells + 1))
    return _from_mesh(mesh, ElementLineP1(), "interval", (length,), lumped)


def rectangle_p1(lx: float, ly: float, nx: int, ny: int, lumped: bool = True) -> Discretisation:
    """P1 elements on ``[0, lx] x [0, ly]``: ``nx x ny`` rectangles, each cut into two triangles."""
    lx = _positive_length(lx, "lx")
    ly = _positive_length(ly, "ly")
    nx = _cell_count(nx, "nx")
    ny = _cell_count(ny, "ny")
    mesh = MeshTri.init_tensor(np.linspace(0.0, lx, nx + 1), np.linspace(0.0, ly, ny + 1))
    disc = _from_mesh(mesh, ElementTriP1(), "rectangle", (lx, ly), lumped)
    return replace(disc, prolongations=_tensor_prolongations(lx, ly, nx, ny))


def _tensor_prolongations(lx: float, ly: float, nx: int, ny: int, coarsest: int = 600) -> tuple[sp.csr_matrix, ...]:
    """Interpolations between the tensor meshes of ``nx x ny``, ``nx/2 x ny/2``, ... cells, coarsest first.

    Counts are halved while both are even, down to a mesh of at most ``coarsest`` nodes; if none is reached the
    mesh gets no hierarchy (empty tuple). ``init_tensor`` cuts every rectangle along the same diagonal, so each
    mesh refines the next coarser one and P1 interpolation (scikit-fem's ``probes``) is exact between them.
    Cells stretched more than 1.5 : 1 get none either: point smoothing loses its power there (measured V-cycle
    contraction on 64 x 64 cells: 0.22 at aspect 1.5, 0.38 at 2, 0.85 at 10; the split backend then uses SuperLU).
    """
    if max(lx / nx, ly / ny) > 1.5 * min(lx / nx, ly / ny):
        return ()
    counts = [(nx, ny)]
    while (counts[-1][0] + 1) * (counts[-1][1] + 1) > coarsest:
        cx, cy = counts[-1]
        if cx % 2 or cy % 2:
            return ()
        counts.append((cx // 2, cy // 2))
    meshes = [MeshTri.init_tensor(np.linspace(0.0, lx, cx + 1), np.linspace(0.0, ly, cy + 1)) for cx, cy in counts]
    out = []
    for fine, coarse in zip(meshes[:-1], meshes[1:], strict=True):
        p = sp.csr_matrix(Basis(coarse, ElementTriP1()).probes(fine.p))
        p.eliminate_zeros()
        out.append(p)
    return tuple(reversed(out))


def disk_node_count(level: int) -> int:
    """Number of nodes of the disk mesh after ``level`` refinements: ``1 + 3 * 2^l * (2^l + 1)``."""
    return 1 + 3 * 2**level * (2**level + 1)


def disk_level(nodes: int) -> int:
    """The refinement level whose node count is nearest ``nodes`` on a log scale (12481 nodes at level 6)."""
    nodes = operator.index(nodes)
    if nodes < 1:
        msg = f"`nodes` must be a positive integer, got {nodes!r}."
        raise ValueError(msg)
    levels = np.arange(12)
    counts = np.array([disk_node_count(int(lev)) for lev in levels])
    return int(levels[np.argmin(np.abs(np.log(counts / nodes)))])


def _disk_mesh(level: int) -> tuple[MeshTri, tuple[sp.csr_matrix, ...]]:
    """Unit-disk mesh: a regular hexagon fanned into 6 triangles, refined ``level`` times; and the interpolations.

    After each uniform refinement the new boundary nodes are projected radially onto the unit circle (the
    construction of ``MeshTri.init_circle``, which starts from a square and so jumps from 8321 to 33025 nodes;
    the hexagon gives 3169, 12481, 49537 and equilateral starting triangles). A radius spans ``2^level``
    element edges. No smoothing: it would lower the smallest angle (about 44 degrees here at every level up
    to 6, largest below 90, so ``K`` has no positive off-diagonal entries).

    The interpolation from each mesh to the next keeps the old nodes and puts every new node (``refined``
    appends one per edge, in edge order) at the mean of its edge's end nodes, the new boundary nodes too: a
    transfer for multigrid, not an exact embedding, since those nodes then move onto the circle.
    """
    angles = np.arange(6) * np.pi / 3.0
    p = np.column_stack([[0.0, 0.0], np.vstack([np.cos(angles), np.sin(angles)])])
    t = np.vstack([np.zeros(6, dtype=np.int64), np.arange(1, 7), np.roll(np.arange(1, 7), -1)])
    mesh = MeshTri(p, t)
    prolongations = []
    for _ in range(level):
        prolongations.append(_midpoint_interpolation(mesh.p.shape[1], mesh.facets))
        mesh = mesh.refined()
        boundary = mesh.boundary_nodes()
        p = mesh.p.copy()
        p[:, boundary] /= np.linalg.norm(p[:, boundary], axis=0)
        mesh = MeshTri(p, mesh.t)
    return mesh, tuple(prolongations)


def _midpoint_interpolation(nodes: int, edges: np.ndarray) -> sp.csr_matrix:
    """``(nodes + edges, nodes)``: identity on the old nodes, then one row of two halves per edge ``(2, e)``."""
    count = edges.shape[1]
    rows = np.concatenate([np.arange(nodes), np.tile(nodes + np.arange(count), 2)])
    cols = np.concatenate([np.arange(nodes), edges[0], edges[1]])
    vals = np.concatenate([np.ones(nodes), np.full(2 * count, 0.5)])
    return sp.csr_matrix((vals, (rows, cols)), shape=(nodes + count, nodes))


def disk_p1(
    radius: float, refine: int | None = None, nodes: int | None = None, lumped: bool = True
) -> Discretisation:
    """P1 elements on the disk of ``radius`` centred at the origin.

    Give either ``refine`` (the refinement level ``l``: ``2^l`` element edges along a radius,
    ``1 + 3 * 2^l * (2^l + 1)`` nodes: 7, 19, 61, 217, 817, 3169, 12481 for ``l = 0 .. 6``) or a target
    node count ``nodes`` (the level nearest it on a log scale is used; anything from 7000 to 24000 gives the
    12481-node "fine" disk). The boundary is the inscribed polygon, so ``weights.sum()`` is below ``pi R^2``
    by ``O(h^2)``.
    """
    radius = _positive_length(radius, "radius")
    if (refine is None) == (nodes is None):
        msg = "Give exactly one of `refine` and `nodes` for a disk."
        raise ValueError(msg)
    if refine is None:
        refine = disk_level(nodes)
    refine = operator.index(refine)
    if not 0 <= refine <= 10:
        msg = f"`refine` must be an integer in 0 .. 10, got {refine!r}."
        raise ValueError(msg)
    mesh, prolongations = _disk_mesh(refine)
    mesh = MeshTri(mesh.p * radius, mesh.t)
    return replace(_from_mesh(mesh, ElementTriP1(), "disk", (radius,), lumped), prolongations=prolongations)


# ---- registry -------------------------------------------------------------------------------------------

Builder = Callable[[tuple[float, ...], object, bool], Discretisation]
DISCRETISATIONS: dict[tuple[str, str], Builder] = {}


def _register(shape: str, method: str) -> Callable[[Builder], Builder]:
    """Add a builder ``(size, resolution, lumped) -> Discretisation`` for ``(shape, method)``."""

    def decorate(builder: Builder) -> Builder:
        DISCRETISATIONS[(shape, method)] = builder
        return builder

    return decorate


def _one_length(size: float | Sequence[float], name: str) -> float:
    """The single length of a 1-parameter domain given as a number or a 1-sequence."""
    values = np.atleast_1d(np.asarray(size, dtype=float))
    if values.shape != (1,):
        msg = f"`size` of a {name} must be one length, got {size!r}."
        raise ValueError(msg)
    return float(values[0])


def _rectangle_cells(size: Sequence[float], resolution: int | Sequence[int]) -> tuple[float, float, int, int]:
    """Side lengths and cell counts: ``resolution`` along the longer side, the other side in proportion."""
    values = np.asarray(size, dtype=float)
    if values.shape != (2,):
        msg = f"`size` of a rectangle must be (Lx, Ly), got {size!r}."
        raise ValueError(msg)
    lx, ly = _positive_length(values[0], "size[0]"), _positive_length(values[1], "size[1]")
    if np.ndim(resolution) == 1:
        if len(resolution) != 2:
            msg = f"`resolution` of a rectangle must be one count or (nx, ny), got {resolution!r}."
            raise ValueError(msg)
        nx, ny = resolution
        return lx, ly, nx, ny
    n = _cell_count(resolution, "resolution")
    long_side = max(lx, ly)
    nx = max(2, round(n * lx / long_side))
    ny = max(2, round(n * ly / long_side))
    return lx, ly, nx, ny


def _unlumped_fv(lumped: bool) -> None:
    """Finite volumes have only a diagonal mass; refuse ``lumped=False`` rather than ignore it."""
    if not lumped:
        msg = "`lumped=False` is only available for method 'p1'; finite volumes have a diagonal mass."
        raise ValueError(msg)


@_register("interval", "fv")
def _interval_fv(size, resolution, lumped):
    _unlumped_fv(lumped)
    return interval_fv(_one_length(size, "interval"), resolution)


@_register("interval", "p1")
def _interval_p1(size, resolution, lumped):
    return interval_p1(_one_length(size, "interval"), resolution, lumped=lumped)


@_register("rectangle", "fv")
def _rectangle_fv(size, resolution, lumped):
    _unlumped_fv(lumped)
    return rectangle_fv(*_rectangle_cells(size, resolution))


@_register("rectangle", "p1")
def _rectangle_p1(size, resolution, lumped):
    return rectangle_p1(*_rectangle_cells(size, resolution), lumped=lumped)


@_register("disk", "p1")
def _disk_p1(size, resolution, lumped):
    n = _cell_count(resolution, "resolution")
    return disk_p1(_one_length(size, "disk"), refine=round(math.log2(n)), lumped=lumped)


def make_discretisation(
    shape: str,
    size: float | Sequence[float],
    resolution: int | Sequence[int],
    method: str = "fv",
    lumped: bool = True,
) -> Discretisation:
    """Build the discretisation of ``shape`` with the given ``method`` from the registry.

    Parameters
    ----------
    shape : ``"interval"``, ``"rectangle"`` or ``"disk"``.
    size : ``L`` (or ``(L,)``), ``(Lx, Ly)``, or ``R`` (or ``(R,)``).
    resolution : interval: number of cells (elements). Rectangle: cells along the longer side, the other side
        in proportion (at least 2), or explicit ``(nx, ny)``. Disk: element edges along a radius, rounded to
        the nearest power of two ``2^l`` on a log scale (``l`` refinements; 64 gives the 12481-node mesh,
        about as fine as a 64-cell-per-side square).
    method : ``"fv"`` (cell-centred finite volumes) or ``"p1"`` (P1 elements); disks are ``"p1"`` only.
    lumped : row-sum lumped (diagonal) mass; ``False`` gives the consistent P1 mass.
    """
    key = (shape, method)
    if key not in DISCRETISATIONS:
        valid = ", ".join(f"{s}/{m}" for s, m in sorted(DISCRETISATIONS))
        hint = " (a disk needs method 'p1')" if shape == "disk" else ""
        msg = f"No discretisation for `shape`={shape!r} with `method`={method!r}{hint}; valid: {valid}."
        raise ValueError(msg)
    return DISCRETISATIONS[key](size, resolution, lumped)
