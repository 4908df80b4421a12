"""Plain records shared by the discretisations, the time stepper and the classifier."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Discretisation", "History", "probe_nodes"]


@dataclass(frozen=True)
class History:
    """Cheap summaries of a run, one row per accepted step (or per recorded step).

    Attributes
    ----------
    t : ``(k,)`` times.
    mean : ``(k, n)`` weighted spatial mean of each species.
    lo, hi : ``(k, n)`` spatial minimum and maximum of each species.
    rate : ``(k,)`` relative norm of the time derivative, ``||du/dt|| / max(||u||, floor)``.
    probe : ``(k, n, p)`` values at ``p`` fixed nodes (`probe_nodes`), or None. A standing wave keeps its mean,
        and its range repeats twice per period; a value at a node repeats once, so periods come from these.
    """

    t: np.ndarray
    mean: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    rate: np.ndarray
    probe: np.ndarray | None = None


def probe_nodes(coords: np.ndarray) -> np.ndarray:
    """Three fixed nodes for `History.probe`: nearest the low and high corners of the bounding box, and an
    off-centre point at 0.37 of its diagonal (off the symmetry lines, where low modes have their nodal lines)."""
    lo, hi = coords.min(axis=0), coords.max(axis=0)
    points = (lo, hi, lo + 0.37 * (hi - lo))
    return np.array([int(np.argmin(((coords - x) ** 2).sum(axis=1))) for x in points])


@dataclass(frozen=True)
class Discretisation:
    """A spatial discretisation with no-flux boundaries, assembled once.

    The semi-discrete system for species ``i`` is ``M du_i/dt = -D_i K u_i + M f_i(u)``.

    Attributes
    ----------
    coords : ``(m, dim)`` node (or cell-centre) coordinates.
    weights : ``(m,)`` quadrature weights for totals and means (they sum to the domain's measure).
    stiffness : ``(m, m)`` sparse ``K``, symmetric positive semi-definite with ``K @ 1 == 0``.
    mass : ``(m, m)`` sparse ``M``; diagonal equal to ``weights`` when lumped.
    lumped : whether ``mass`` is diagonal.
    shape : ``"interval"``, ``"rectangle"`` or ``"disk"``.
    size : ``(L,)``, ``(Lx, Ly)`` or ``(R,)``.
    method : ``"fv"`` (cell-centred finite volumes) or ``"p1"`` (scikit-fem P1 elements).
    grid : cell counts ``(nx,)`` or ``(nx, ny)`` for uniform finite-volume grids (fast cosine-transform
        solves apply), None otherwise. Cell ``(i, j)`` is node ``i * ny + j`` (C order).
    prolongations : for a mesh at the top of a nested hierarchy (the refined P1 disk; P1 rectangles whose
        cell counts halve down to a small mesh, cells no more stretched than 1.5 : 1), the sparse
        interpolations from each coarser mesh to the next finer, coarsest first, the last onto these nodes
        (geometric multigrid uses them, see `solvers.multigrid`); empty otherwise.
    """

    coords: np.ndarray
    weights: np.ndarray
    stiffness: object
    mass: object
    lumped: bool
    shape: str
    size: tuple[float, ...]
    method: str
    grid: tuple[int, ...] | None = None
    prolongations: tuple = ()

    @property
    def m(self) -> int:
        """Number of nodes."""
        return self.coords.shape[0]

    @property
    def dim(self) -> int:
        """Spatial dimension."""
        return self.coords.shape[1]
