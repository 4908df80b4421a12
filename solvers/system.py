"""The semi-discrete reaction-diffusion system ``M du_i/dt = -D_i K u_i + M f_i(u)`` as plain operators.

The state of ``n`` species on ``m`` nodes is an ``(n, m)`` array; flattened (C order, species-major) it is
the ``y`` of `scipy.integrate.solve_ivp`. `MolSystem` exposes the right-hand side ``rhs(t, y)``, its sparse
Jacobian ``jac(t, y)`` and the fixed pattern ``jac_sparsity``, so that ``solve_ivp`` can always run the
problem: that is the reference route. It also exposes the *mass form* used by our own stepper and by the
Newton polish, ``B du/dt = F(u)``, with ``B = I`` for a lumped mass (``F`` is then ``rhs``) and ``B = M``
(block-diagonal over species) for a consistent one.

Consistent (non-lumped) mass: ``rhs`` applies ``M^-1`` by a solve with a factorisation made once, but the
Jacobian of ``rhs`` is then dense, so ``jac`` and ``jac_sparsity`` (and hence the ``scipy-bdf`` route) are
restricted to lumped mass. The mass form (`force`, `mass_jacobian`) handles both.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from .records import Discretisation

__all__ = ["MolSystem"]


def _check_diffusion(diffusion: np.ndarray) -> np.ndarray:
    """Return ``diffusion`` as a 1-D float array of finite non-negative values, or raise."""
    d = np.atleast_1d(np.asarray(diffusion, dtype=float))
    if d.ndim != 1 or not np.all(np.isfinite(d)) or np.any(d < 0.0):
        msg = f"`diffusion` must be a 1-D array of finite non-negative numbers, got {diffusion!r}."
        raise ValueError(msg)
    return d


def _edge_form(stiffness: sp.csr_matrix) -> tuple[sp.csr_matrix, sp.csr_matrix, np.ndarray]:
    """``K = G^T diag(c) G`` for a symmetric ``K`` with zero row sums: ``G``, ``G^T`` and ``c``.

    Each edge ``(j, k)``, ``j < k``, with ``K_jk != 0`` is a row of ``G`` (``+1`` at ``j``, ``-1`` at
    ``k``) with conductance ``c = -K_jk``. ``G u`` is then one exact-sign subtraction per edge. ``G^T`` is
    kept in CSR too, for one CSR product per species.
    """
    rows = np.repeat(np.arange(stiffness.shape[0]), np.diff(stiffness.indptr))
    upper = (stiffness.indices > rows) & (stiffness.data != 0.0)
    rows, cols, vals = rows[upper], stiffness.indices[upper], stiffness.data[upper]
    e = rows.size
    grad = sp.csr_matrix((np.tile([1.0, -1.0], e), np.column_stack([rows, cols]).ravel(), np.arange(0, 2 * e + 1, 2)),
                         shape=(e, stiffness.shape[0]))
    return grad, grad.T.tocsr(), -vals


def grid_conductances(stiffness: sp.csr_matrix, grid: tuple[int, ...] | None) -> tuple[float, ...] | None:
    """Per-axis face conductances when ``K`` is the uniform two-point stiffness of ``grid`` (C order), else None.

    Checked, not assumed: the slice-wise product (`_grid_product`) must match ``K @ v`` on a random ``v``.
    """
    if grid is None or int(np.prod(grid)) != stiffness.shape[0] or min(grid) < 2:
        return None
    strides = [int(np.prod(grid[a + 1 :])) for a in range(len(grid))]
    row0 = slice(stiffness.indptr[0], stiffness.indptr[1])
    cols, vals = stiffness.indices[row0], stiffness.data[row0]
    conds = tuple(float(-vals[cols == s].sum()) for s in strides)
    v = np.cos(2.399963 * np.arange(stiffness.shape[0]) ** 1.5)[None]  # a fixed, irregular test vector
    direct = stiffness @ v[0]
    sliced = _grid_product(v, tuple(grid), grid_faces(tuple(grid), conds))[0]
    if not np.linalg.norm(direct - sliced) <= 1e-12 * np.linalg.norm(direct):
        return None
    return conds


def grid_faces(grid: tuple[int, ...], conds) -> list[tuple[tuple[slice, ...], tuple[slice, ...], object]]:
    """``(low side, high side, conductance)`` per axis for `_grid_product`, made once.

    ``conds`` holds one conductance per axis, or an ``(n, axes)`` array of them per species.
    """
    faces = []
    for axis in range(len(grid)):
        c = np.reshape(conds[:, axis], (-1,) + (1,) * len(grid)) if np.ndim(conds) == 2 else conds[axis]
        lo = [slice(None)] * (len(grid) + 1)
        hi = list(lo)
        lo[axis + 1], hi[axis + 1] = slice(None, -1), slice(1, None)
        faces.append((tuple(lo), tuple(hi), c))
    return faces


def _grid_product(u: np.ndarray, grid: tuple[int, ...], faces) -> np.ndarray:
    """``K u_i`` on a uniform grid by slices; each face flux ``c (u_lo - u_hi)`` enters both cells, signs opposite."""
    v = u.reshape(u.shape[:1] + grid)
    out = np.zeros_like(v)
    for lo, hi, c in faces:
        flux = v[lo] - v[hi]
        flux *= c
        out[lo] += flux
        out[hi] -= flux
    return out.reshape(u.shape)


class MolSystem:
    """Method-of-lines operators of one reaction-diffusion model on one discretisation.

    Parameters
    ----------
    disc : the spatial discretisation (no-flux, assembled once).
    diffusion : ``(n,)`` diffusion coefficients, 0 allowed.
    reaction : ``u (n, m) -> f (n, m)``.
    jacobian : ``u (n, m) -> J (n, n, m)``, ``J[i, j] = d f_i / d u_j``.
    """

    def __init__(
        self,
        disc: Discretisation,
        diffusion: np.ndarray,
        reaction: Callable[[np.ndarray], np.ndarray],
        jacobian: Callable[[np.ndarray], np.ndarray],
    ) -> None:
        self.disc = disc
        self.diffusion = _check_diffusion(diffusion)
        self.reaction = reaction
        self.jacobian = jacobian
        self.n = self.diffusion.size
        self.m = disc.m
        self.shape = (self.n, self.m)
        self.lumped = bool(disc.lumped)
        stiffness = sp.csr_matrix(disc.stiffness, dtype=float)
        stiffness.sum_duplicates()
        self._mass_lu = None if self.lumped else spla.splu(sp.csc_matrix(disc.mass, dtype=float))
        self.stiffness = stiffness
        self._edges = None  # made when first needed (`stiffness_product` off uniform grids)
        conds = grid_conductances(stiffness, disc.grid)
        self._grid = self._grid_force = None
        if conds is not None:
            grid, w = tuple(disc.grid), disc.weights
            self._grid_shape = grid
            self._grid = grid_faces(grid, conds)
            if self.lumped and np.all(w == w[0]):
                self._grid_force = grid_faces(grid, -np.outer(self.diffusion / w[0], conds))  # -D_i / w folded in
        self._build_pattern()

    # ---- mass form B du/dt = F(u) --------------------------------------------------------------------

    def force(self, u: np.ndarray) -> np.ndarray:
        """``F(u)`` of the mass form, ``(n, m)``: ``rhs`` for lumped mass, ``-D K u + M f(u)`` otherwise.

        ``K u`` is formed edge by edge (`stiffness_product`), so that the diffusion part of the total
        rate is zero up to the rounding of the edge fluxes, not of the nodal values.
        """
        f = np.asarray(self.reaction(u), dtype=float)
        if self._grid_force is not None:
            # uniform grid, equal weights: -D_i / w folded into the face conductances, same fluxes both ways
            out = _grid_product(u, self._grid_shape, self._grid_force)
            out += f
            return out
        ku = self.stiffness_product(u)
        if self.lumped:
            return -self.diffusion[:, None] * (ku / self.disc.weights) + f
        return -self.diffusion[:, None] * ku + (self.disc.mass @ f.T).T

    def stiffness_product(self, u: np.ndarray) -> np.ndarray:
        """``K u_i`` per species, ``(n, m)``, as the divergence of edge fluxes ``c_e (u_j - u_k)``.

        Equal to ``K @ u_i`` in exact arithmetic (``K`` has zero row sums). In floating point every flux
        enters its two nodes with opposite signs and the same magnitude, and it is rounded on the scale of
        the difference ``u_j - u_k``, not of ``u``: ``sum_j (K u)_j`` is then zero to the rounding of the
        sums of fluxes. The nodal product ``K @ u`` instead rounds ``K_jj u_j`` on the scale of ``u`` and
        on P1 meshes (non-uniform ``K``, ``weights``) leaves a systematic total rate that does not vanish at
        a steady state (measured: 4e-10 relative drift of a conserved total over t = 500 in 1D). Uniform
        grids take the same fluxes by array slices (1.6-2.5 times faster than the sparse edge products:
        ``benchmarks/bench_kernels.py``).
        """
        if self._grid is not None:
            return _grid_product(u, self._grid_shape, self._grid)
        if self._edges is None:
            self._edges = _edge_form(self.stiffness)
        grad, grad_t, cond = self._edges
        out = np.empty_like(u, dtype=float)
        for i in range(u.shape[0]):
            out[i] = grad_t @ (cond * (grad @ u[i]))
        return out

    def apply_mass(self, v: np.ndarray) -> np.ndarray:
        """``B v`` for ``v (n, m)``: ``v`` itself for lumped mass, ``M v_i`` per species otherwise."""
        if self.lumped:
            return v
        return (self.disc.mass @ v.T).T

    def solve_mass(self, v: np.ndarray) -> np.ndarray:
        """``B^-1 v`` for ``v (n, m)``, with the factorisation of ``M`` made once."""
        if self.lumped:
            return v
        return self._mass_lu.solve(np.ascontiguousarray(v.T)).T

    def rate(self, u: np.ndarray, force: np.ndarray | None = None) -> np.ndarray:
        """``du/dt`` at ``u``, ``(n, m)``; pass ``force = F(u)`` if it is already known."""
        return self.solve_mass(self.force(u) if force is None else force)

    def mass_jacobian(self, u: np.ndarray, *, jr: np.ndarray | None = None) -> sp.csr_matrix:
        """Sparse ``dF/du`` of the mass form (equal to `jac` for lumped mass)."""
        jr = self.jacobian(u) if jr is None else jr
        if self.lumped:
            return self._jac_from_blocks(jr)
        mass = sp.csr_matrix(self.disc.mass)
        blocks = [[mass @ sp.diags(jr[i, j]) for j in range(self.n)] for i in range(self.n)]
        return (sp.kron(sp.diags(-self.diffusion), self.stiffness) + sp.bmat(blocks, format="csr")).tocsr()

    def jacobian_data(self, u: np.ndarray) -> np.ndarray:
        """The entries of `jac` at ``u`` in the order of the fixed pattern (`pattern`), lumped mass only.

        For callers that place the entries themselves (the banded LU) without building a sparse matrix.
        """
        self._require_lumped("jacobian_data")
        return self._pattern_data(self.jacobian(u))

    @property
    def pattern(self) -> tuple[np.ndarray, np.ndarray]:
        """``(indptr, indices)`` of the fixed CSR pattern of `jac` (lumped mass)."""
        return self._pattern_indptr, self._pattern_indices

    # ---- the reference route: y' = rhs(t, y) -------------------------------------------------------------

    def rhs(self, t: float, y: np.ndarray) -> np.ndarray:
        """``dy/dt`` for the flattened state ``y (n*m,)`` (the ``fun`` of ``solve_ivp``)."""
        u = np.asarray(y, dtype=float).reshape(self.shape)
        return self.rate(u).ravel()

    def jac(self, t: float, y: np.ndarray) -> sp.csr_matrix:
        """Sparse Jacobian of `rhs` (lumped mass only): ``kron(-diag D, M^-1 K)`` plus the node blocks."""
        self._require_lumped("jac")
        return self._jac_from_blocks(self.jacobian(np.asarray(y, dtype=float).reshape(self.shape)))

    @property
    def jac_sparsity(self) -> sp.csr_matrix:
        """The fixed pattern of `jac` (ones), for ``solve_ivp(..., jac_sparsity=...)`` with finite differences."""
        self._require_lumped("jac_sparsity")
        data = np.ones_like(self._pattern_indices, dtype=float)
        size = self.n * self.m
        return sp.csr_matrix((data, self._pattern_indices, self._pattern_indptr), shape=(size, size))

    def totals(self, u: np.ndarray, rows: np.ndarray) -> np.ndarray:
        """Conserved totals ``sum_i w_i (weights @ u_i)`` for each row ``w`` of ``rows (c, n)``."""
        rows = np.asarray(rows, dtype=float).reshape(-1, self.n)
        return rows @ (u @ self.disc.weights)

    # ---- internals ---------------------------------------------------------------------------------------

    def _require_lumped(self, what: str) -> None:
        """Raise if the mass is consistent: the Jacobian of ``M^-1 F`` is dense."""
        if not self.lumped:
            msg = (
                f"`{what}` needs a lumped (diagonal) mass; with a consistent mass the Jacobian of M^-1 F is "
                "dense. Use the mass form (`mass_jacobian`) or a lumped discretisation."
            )
            raise ValueError(msg)

    def _build_pattern(self) -> None:
        """Fix the CSR pattern of the Jacobian and where diffusion and reaction entries land in it.

        Diffusion entries ``-D_i K_rc / w_r`` (lumped; ``-D_i K_rc`` otherwise) in each species' diagonal
        block, one reaction entry per node in every block; kept even where ``D_i = 0`` so that the pattern
        does not depend on the values.
        """
        n, m = self.n, self.m
        size = n * m
        k = self.stiffness
        krow = np.repeat(np.arange(m, dtype=np.int64), np.diff(k.indptr))
        kval = k.data / self.disc.weights[krow] if self.lumped else k.data
        shift = (np.arange(n, dtype=np.int64) * m)[:, None]
        d_keys = ((krow + shift) * size + (k.indices + shift)).ravel()
        node = np.arange(m, dtype=np.int64)
        blocks = np.arange(n, dtype=np.int64) * m
        r_rows = (blocks[:, None, None] + node).repeat(n, axis=1).ravel()
        r_cols = np.broadcast_to(blocks[None, :, None] + node, (n, n, m)).ravel()
        r_keys = r_rows * size + r_cols
        # step: sort all keys once; each entry's position in the pattern is the rank of its distinct key
        every = np.concatenate([d_keys, r_keys])
        order = np.argsort(every, kind="stable")
        ranked = every[order]
        new = np.empty(ranked.size, dtype=bool)
        new[0] = True
        np.not_equal(ranked[1:], ranked[:-1], out=new[1:])
        pos = np.empty(every.size, dtype=np.int64)
        pos[order] = np.cumsum(new) - 1
        keys = ranked[new]
        self._pattern_indptr = np.concatenate([[0], np.cumsum(np.bincount(keys // size, minlength=size))])
        self._pattern_indices = keys % size
        self._base = np.zeros(keys.size)
        self._base[pos[: d_keys.size]] = (-self.diffusion[:, None] * kval).ravel()
        self._reaction_pos = pos[d_keys.size :]
        self.diagonal_pos = self._reaction_pos.reshape(n, n, m)[np.arange(n), np.arange(n)].ravel()

    def _pattern_data(self, jr: np.ndarray) -> np.ndarray:
        """Diffusion plus the reaction blocks ``jr (n, n, m)``, as entries of the fixed pattern."""
        data = self._base.copy()
        data[self._reaction_pos] += np.asarray(jr, dtype=float).ravel()
        return data

    def _jac_from_blocks(self, jr: np.ndarray) -> sp.csr_matrix:
        """The fixed pattern filled by `_pattern_data`, as a CSR matrix."""
        size = self.n * self.m
        return sp.csr_matrix((self._pattern_data(jr), self._pattern_indices, self._pattern_indptr),
                             shape=(size, size))
