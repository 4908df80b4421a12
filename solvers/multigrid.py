"""Geometric multigrid for ``M + g K`` on nested meshes: the per-species diffusion solve of the ``"split"`` backend.

On a mesh at the top of a nested hierarchy (the refined disk of `solvers.fem.disk_p1`, P1 rectangles whose
cell counts halve) the interpolation from each coarser mesh to the next finer is known, and one V-cycle
contracts the error of ``(M + g K) x = b`` by a factor of 0.1 to 0.2 in the energy norm, independently of the
mesh size and of ``g >= 0`` (measured, see `tests/solvers/test_multigrid.py`). One cycle costs a few sparse
products per level, and a new ``g`` costs a few vector operations and a dense factorisation on the coarsest
level: on the 12481-node disk 0.86 ms per cycle against 1.2 ms for a SuperLU solve, and 0.8 ms per new ``g``
against 35 ms for a SuperLU factorisation (``benchmarks/bench_kernels.py``).

Method (textbook; Briggs, Henson & McCormick 2000, *A Multigrid Tutorial*, 2nd ed., ch. 3 and 10, from
memory): Galerkin coarse operators ``A_c = P^T A P`` (formed once for ``M`` and ``K`` separately, so that a new
``g`` only adds two arrays), a V(1,1) cycle, a dense Cholesky factorisation on the coarsest level. The smoother
is a Chebyshev polynomial in ``D^-1 A`` (``D`` the diagonal) over ``[lambda / 4, lambda]``, with ``lambda``
Gershgorin's bound on the largest eigenvalue of ``D^-1 A`` (Adams, Brezina, Hu & Tuminaro 2003, J. Comput. Phys.
188, "Parallel multigrid smoothing: polynomial versus Gauss-Seidel", from memory; the three-term recurrence of
Saad 2003, *Iterative Methods for Sparse Linear Systems*, 2nd ed., Algorithm 12.1, from memory). The lower
end ``lambda / 4`` is common practice for smoothers: the polynomial need only damp the upper part of the
spectrum, which the coarse levels cannot represent.

The cycle is a fixed linear map of ``b``, so it can precondition a Krylov method. It is followed by a
constant shift that makes ``1^T A x = 1^T b`` exact (``K 1 = 0`` and ``K`` symmetric, so ``1^T A x = w^T x``
with ``w = M^T 1``): an exact solve keeps this total, and the stepper's conservation rests on it.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp

__all__ = ["Multigrid"]


@dataclass(frozen=True)
class _Level:
    """One level: ``M`` and ``K`` on a common sparsity pattern, with the bounds a new ``g`` needs."""

    pattern: sp.csr_matrix  # structure shared by M and K (`update` puts M + g K on its indices)
    mass: np.ndarray  # entries of M on the pattern
    stiffness: np.ndarray  # entries of K on the pattern
    mass_diag: np.ndarray
    stiffness_diag: np.ndarray
    mass_abs: np.ndarray  # row sums of |M|
    stiffness_abs: np.ndarray  # row sums of |K|

    @classmethod
    def of(cls, mass: sp.spmatrix, stiffness: sp.spmatrix) -> _Level:
        """Put ``M`` and ``K`` on the union of their patterns."""
        mass, stiffness = sp.csr_matrix(mass), sp.csr_matrix(stiffness)
        pattern = sp.csr_matrix(abs(mass) + abs(stiffness))
        pattern.sum_duplicates()
        pattern.sort_indices()
        rows = np.repeat(np.arange(pattern.shape[0]), np.diff(pattern.indptr))
        return cls(
            pattern=pattern,
            mass=_entries(mass, rows, pattern.indices),
            stiffness=_entries(stiffness, rows, pattern.indices),
            mass_diag=mass.diagonal(),
            stiffness_diag=stiffness.diagonal(),
            mass_abs=np.asarray(abs(mass).sum(axis=1)).ravel(),
            stiffness_abs=np.asarray(abs(stiffness).sum(axis=1)).ravel(),
        )


def _entries(a: sp.csr_matrix, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
    """Entries ``a[rows, cols]`` (zero where ``a`` has none), by one sorted search over linear indices."""
    a = a.tocoo()
    a.sum_duplicates()
    n = a.shape[1]
    keys = a.row.astype(np.int64) * n + a.col
    order = np.argsort(keys)
    keys, data = keys[order], a.data[order]
    want = rows.astype(np.int64) * n + cols
    pos = np.minimum(np.searchsorted(keys, want), len(keys) - 1)
    return np.where(keys[pos] == want, data[pos], 0.0)


class Multigrid:
    """Approximate solves of ``(M + g K) x = b`` by one V-cycle on a hierarchy of nested meshes.

    Parameters
    ----------
    mass, stiffness : the finest level's ``M`` (symmetric positive definite) and ``K`` (symmetric, ``K 1 = 0``).
    prolongations : interpolation matrices from each coarser mesh to the next finer, coarsest first; the last
        maps onto the nodes of ``mass``.
    coarse_nodes : levels are used from the finest down to the first with at most this many nodes (or the
        coarsest given), which is solved exactly.
    degree : degree of the Chebyshev smoother (pre- and post-smoothing alike).

    Call `update` with ``g`` before `solve`.
    """

    def __init__(self, mass, stiffness, prolongations: Sequence[sp.spmatrix] = (), coarse_nodes: int = 300,
                 degree: int = 2) -> None:
        if degree < 1:
            msg = f"`degree` must be at least 1, got {degree!r}."
            raise ValueError(msg)
        self.degree = int(degree)
        mass, stiffness = sp.csr_matrix(mass), sp.csr_matrix(stiffness)
        self.weights = np.asarray(mass.sum(axis=0)).ravel()  # w = M^T 1
        self._total = float(self.weights.sum())
        levels, prols = [_Level.of(mass, stiffness)], []
        for p in reversed(list(prolongations)):
            if levels[0].pattern.shape[0] <= coarse_nodes:
                break
            p = sp.csr_matrix(p)
            if p.shape[0] != mass.shape[0]:
                msg = f"`prolongations`: one maps onto {p.shape[0]} nodes where the level above has {mass.shape[0]}."
                raise ValueError(msg)
            mass, stiffness = sp.csr_matrix(p.T @ mass @ p), sp.csr_matrix(p.T @ stiffness @ p)
            levels.insert(0, _Level.of(mass, stiffness))
            prols.insert(0, p)
        self.levels = levels
        self.prolongations = prols
        self.restrictions = [sp.csr_matrix(p.T) for p in prols]

    @property
    def sizes(self) -> list[int]:
        """Node count per level, coarsest first."""
        return [lev.pattern.shape[0] for lev in self.levels]

    def update(self, g: float) -> None:
        """Make the cycle solve ``(M + g K) x = b``: every level's matrix, diagonal and Chebyshev interval."""
        self._a, self._dinv, self._upper = [], [], []
        for lev in self.levels:
            a = sp.csr_matrix((lev.mass + g * lev.stiffness, lev.pattern.indices, lev.pattern.indptr),
                              shape=lev.pattern.shape)
            diag = lev.mass_diag + g * lev.stiffness_diag
            self._a.append(a)
            self._dinv.append(1.0 / diag)
            # Gershgorin: every eigenvalue of D^-1 A is at most the largest |row| sum over the diagonal
            self._upper.append(float(np.max((lev.mass_abs + g * lev.stiffness_abs) / diag)))
        self._coarse = sla.cho_factor(self._a[0].toarray())

    def solve(self, b: np.ndarray) -> np.ndarray:
        """One V-cycle from zero for ``(M + g K) x = b``, shifted by a constant to keep ``1^T A x = 1^T b``."""
        x = self._cycle(len(self.levels) - 1, np.asarray(b, dtype=float))
        return x + (b.sum() - self.weights @ x) / self._total

    def _cycle(self, level: int, b: np.ndarray) -> np.ndarray:
        if level == 0:
            return sla.cho_solve(self._coarse, b)
        a = self._a[level]
        x = self._smooth(level, None, b)
        coarse = self._cycle(level - 1, self.restrictions[level - 1] @ (b - a @ x))
        x += self.prolongations[level - 1] @ coarse
        return self._smooth(level, x, b)

    def _smooth(self, level: int, x: np.ndarray | None, b: np.ndarray) -> np.ndarray:
        """``degree`` Chebyshev steps on ``D^-1 A x = D^-1 b`` from ``x`` (None: zero)."""
        a, dinv, upper = self._a[level], self._dinv[level], self._upper[level]
        lower = upper / 4.0
        theta, delta = 0.5 * (upper + lower), 0.5 * (upper - lower)
        sigma = theta / delta
        rho = 1.0 / sigma
        r = dinv * b if x is None else dinv * (b - a @ x)
        d = r / theta
        x = d.copy() if x is None else x + d
        for _ in range(self.degree - 1):
            r -= dinv * (a @ d)
            rho_next = 1.0 / (2.0 * sigma - rho)
            d = (rho_next * rho) * d + (2.0 * rho_next / delta) * r
            rho = rho_next
            x += d
        return x
