"""Reaction kinetics with parameter values bound: the plain data every analysis takes."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

__all__ = ["Kinetics", "conserved_basis", "reduced_eigenvalues"]


@dataclass(frozen=True)
class Kinetics:
    """Kinetics of one model at one parameter point.

    Attributes
    ----------
    species : names in order; index ``i`` of every array below is species ``species[i]``.
    diffusion : ``(n,)`` diffusion coefficients (0 allowed).
    slow : ``(n,)`` bool, True for slow (membrane-like) species, False for fast ones.
    conservation : ``(c, n)`` rows ``w`` with ``w @ reaction(u) == 0`` identically (may be ``(0, n)``).
    reaction : ``u (n, m) -> f (n, m)``, vectorised over ``m`` points.
    jacobian : ``u (n, m) -> J (n, n, m)`` with ``J[i, j] = d f_i / d u_j``.
    dparam : ``u (n, m) -> (n, m)``, derivative of the reaction in the sweep parameter, or None.
    params : the parameter values bound, for reports.
    """

    species: tuple[str, ...]
    diffusion: np.ndarray
    slow: np.ndarray
    conservation: np.ndarray
    reaction: Callable[[np.ndarray], np.ndarray]
    jacobian: Callable[[np.ndarray], np.ndarray]
    dparam: Callable[[np.ndarray], np.ndarray] | None = None
    params: dict[str, float] = field(default_factory=dict)

    @property
    def n(self) -> int:
        """Number of species."""
        return len(self.species)

    def f(self, u: np.ndarray) -> np.ndarray:
        """Reaction at a single state ``u (n,)``, returned as ``(n,)``."""
        return self.reaction(np.asarray(u, dtype=float)[:, None])[:, 0]

    def jac(self, u: np.ndarray) -> np.ndarray:
        """Jacobian at a single state ``u (n,)``, returned as ``(n, n)``."""
        return self.jacobian(np.asarray(u, dtype=float)[:, None])[:, :, 0]


def conserved_basis(conservation: np.ndarray, n: int) -> np.ndarray:
    """Orthonormal basis ``Q (n, n - c)`` of the directions that keep every conserved total fixed."""
    w = np.asarray(conservation, dtype=float).reshape(-1, n)
    if w.shape[0] == 0:
        return np.eye(n)
    _, s, vt = np.linalg.svd(w)
    rank = int(np.sum(s > 1e-12 * max(1.0, s.max())))
    return vt[rank:].T


def reduced_eigenvalues(jac: np.ndarray, conservation: np.ndarray) -> np.ndarray:
    """Eigenvalues of ``jac`` with the conserved directions' structural zeros left out.

    For a conserved row ``w`` (``w @ J == 0``) the range of ``J`` lies in ``w``'s null space, so
    ``Q.T @ J @ Q`` on an orthonormal basis ``Q`` of that space carries every other eigenvalue.
    """
    jac = np.asarray(jac, dtype=float)
    q = conserved_basis(conservation, jac.shape[0])
    return np.linalg.eigvals(q.T @ jac @ q)
