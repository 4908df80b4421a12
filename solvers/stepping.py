"""Time integration of the semi-discrete system to a settled state, with error control.

Our stepper is a linearly implicit Rosenbrock W-method in mass form ``B u' = F(u)`` (`RosenbrockW`), with
two tableaus (registry `TABLEAUS`), written in the transformed form that needs no Jacobian products::

    W u_i = gamma h F(u_n + sum_j a_ij u_j) + B sum_j c_ij u_j,   W = B - gamma h A,
    u_{n+1} = u_n + sum_i m_i u_i,   error estimate sum_i e_i u_i.

- ``"ros34pw2"`` (default): Rang & Angermann (2005, BIT 45), 4 stages, order 3 with an embedded order-2
  solution, L-stable and stiffly accurate with the exact Jacobian.
- ``"ros2"``: Verwer, Spee, Blom & Hundsdorfer (1999, SIAM J. Sci. Comput. 20), 2 stages, order 2, error
  against the embedded Euler step.

Both are W-methods: their order holds for *any* ``A``. That is why this family was chosen: ``W`` may be
kept across steps (factorisation reuse) or replaced by a cheap approximate factorisation without losing
the order, only stability margin, which the error control watches. Both diffusion and reactions are
linearly implicit, with the analytic reaction Jacobian. A steady state is a fixed point of the step for any
``W`` (``F = 0`` gives ``u_i = 0``), and as the state settles the stages vanish and the step grows by the
controller's maximum factor (5) per step.

Choice by measurement (this machine, 2 shared cores, with the sparse-LU backend of the time): on the 1D
polarity problem (1000 cells, t = 200) ROS34PW2 took 35 steps and 0.043 s at final-state error 2.4e-4 (rtol
1e-3), ROS2 90 steps and 0.063 s at error 1.2e-3; on the Fisher-KPP front (1500 cells) 0.24 s against 1.6 s
at the same rtol. ROS2's estimate is that of a first-order solution and is far too pessimistic at tight
tolerances. ROS34PW2 is the default; ROS2 stays for comparison and tests. Not implemented: ROS3P (not a
W-method), variable-step BDF2 (Newton iterations per step), IMEX SBDF2 (explicit reactions: a large step
near a steady state can destabilise it).

Four linear-solve backends (registry `BACKENDS`; ``"split"``, for P1 meshes in 2D, is `SpeciesFactored`:
GMRES on the exact ``W``, preconditioned by per-species diffusion solves, multigrid V-cycles on refined disks):

- ``"lu"``: the sparse ``W`` with the Jacobian at the current state, factorised by SuperLU, kept while the
  step stays within a dead band of the step it was made for and the Jacobian is younger than
  ``jac_every`` steps; refactorised at once after a rejection.
- ``"banded"``: the same exact ``W`` on 1D meshes in LAPACK band storage (``dgbtrf``/``dgbtrs``), about
  six times cheaper to factorise than SuperLU there (``benchmarks/bench_kernels.py``). Default in 1D.
- ``"dct"``: uniform finite-volume grids (lumped mass). Approximate factorisation
  ``W ~ (I + gamma h D Lambda)(I - gamma h S J_r)``: the diffusion factor is diagonal after a type-2 cosine
  transform (it diagonalises the Neumann finite-volume Laplacian exactly), the reaction factor is a small
  ``n x n`` block per node, bounded (``S``) so that the factorisation error cannot stall the step. Both
  are rebuilt for every new step size at the cost of a few vector operations. Near a steady state its
  steps would hover at the stability limit of the explicit remainder (about ``10 / |J_r|``, with a
  third of the steps rejected and the relative rate stuck near ``rtol``, so a run would never settle);
  the stepper therefore hands over to ``"lu"`` once the step is stability-limited near rest (see
  `RosenbrockW._maybe_switch`), after which the step grows without bound. Default on 2D uniform grids;
  1D uses the exact ``"banded"`` (as cheap per step there, and it settles in far fewer steps: measured).

Error control: weighted RMS (node weights) of the error estimate over ``atol + rtol |u|``; the error
actually made is usually below ``rtol``. Compare methods at equal error, not equal ``rtol`` (the benchmark
does). Speed figures are printed by ``benchmarks/bench_solvers.py``, never asserted.

Conservation: for a row ``w`` with ``w @ f == 0`` every stage satisfies ``sum_i w_i 1^T B u_i = 0`` exactly
in exact arithmetic (``1^T K = 0``, ``w^T J_r = 0``, for the bounded reaction factor too), for both
backends, so totals are kept to round-off: ``F`` forms ``K u`` as a divergence of edge fluxes
(`MolSystem.stiffness_product`), whose total rounds on the scale of the fluxes; measured drift below 1e-15
relative over t = 500 on P1 intervals, rectangles and disks (the nodal product ``M^-1 K @ u`` drifted
4e-10 on a P1 interval).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace

import numpy as np
import scipy.fft as sfft
import scipy.sparse as sp
import scipy.sparse.linalg as spla
from scipy.integrate import BDF, DenseOutput, OdeSolver
from scipy.linalg.blas import dtbsv as _tbsv
from scipy.linalg.lapack import dgbtrf as _gbtrf
from scipy.linalg.lapack import dgbtrs as _gbtrs

from .multigrid import Multigrid
from .records import Discretisation, History, probe_nodes
from .settle import SettleRule, relative_rate
from .system import MolSystem

__all__ = ["BACKENDS", "METHODS", "TABLEAUS", "RosenbrockW", "RunResult", "StopRun", "Tableau", "integrate"]



class StopRun(StopIteration):
    """Raised by an observer's ``handle`` to end a run early (status ``reached-end``)."""


class BackendError(RuntimeError):
    """A linear-solve backend could not build or apply ``W`` (singular, non-finite)."""


# ---- linear-solve backends ---------------------------------------------------------------------------

BACKENDS: dict[str, type] = {}


def _backend(name: str):
    """Register a backend class under ``name``."""

    def deco(cls: type) -> type:
        cls.name = name
        BACKENDS[name] = cls
        return cls

    return deco


def dissection_order(coords: np.ndarray, adjacency: sp.csr_matrix, leaf: int = 64) -> np.ndarray:
    """A nested-dissection node order from coordinates: halve at the median of the longest side, recurse.

    The separator is the side of the cut that touches the other half; it is numbered after both halves,
    so that elimination fills in only within halves and separators. On the 12481-node disk this halves
    SuperLU's factorisation time against its own column orderings (measured).
    """
    out: list[np.ndarray] = []
    mark = np.zeros(coords.shape[0], dtype=bool)
    stack = [(np.arange(coords.shape[0]), False)]
    while stack:
        idx, done = stack.pop()
        if done or idx.size <= leaf:
            out.append(idx)
            continue
        c = coords[idx]
        axis = int(np.argmax(c.max(axis=0) - c.min(axis=0)))
        low = c[:, axis] < np.median(c[:, axis])
        if low.all() or not low.any():
            out.append(idx)
            continue
        left, right = idx[low], idx[~low]
        mark[left] = True
        sub = adjacency[right]
        hits = np.diff(np.concatenate([[0], np.cumsum(mark[sub.indices])])[sub.indptr])
        mark[left] = False
        touch = hits > 0
        # step: numbered in the order left, right-without-separator, separator (stack is last in, first out)
        stack.extend([(right[touch], True), (right[~touch], False), (left, False)])
    return np.concatenate(out)


@_backend("lu")
class SparseLU:
    """``W = B - gamma h J(u)`` assembled sparse and factorised by SuperLU; reused while it is valid.

    Unknowns are renumbered node by node (species of a node together) in a nested-dissection order of
    the nodes, and SuperLU keeps that order (``permc_spec="NATURAL"``).
    """

    cheap_rescale = False
    cheap_jacobian = False
    exact = True

    def __init__(self, system: MolSystem) -> None:
        self.system = system
        self.njev = 0
        self.nlu = 0
        self._lu = None
        self._jac = None
        n, m = system.n, system.m
        order = dissection_order(system.disc.coords, sp.csr_matrix(system.disc.stiffness))
        self._perm = (order[:, None] + m * np.arange(n)[None, :]).ravel()
        if system.lumped:
            # step: where each entry of the fixed Jacobian pattern (`MolSystem.pattern`) lands when permuted
            indptr, indices = system.pattern
            size = n * m
            probe = sp.csr_matrix((np.arange(1, indices.size + 1, dtype=float), indices, indptr),
                                  shape=(size, size))[self._perm][:, self._perm]
            probe.sort_indices()
            self._map = probe.data.astype(np.int64) - 1
            self._indices, self._indptr = probe.indices, probe.indptr
            self._diag = np.flatnonzero(np.isin(self._map, system.diagonal_pos))
        else:
            self._mass = sp.block_diag([system.disc.mass] * n, format="csr")

    def update(self, u: np.ndarray | None, gh: float) -> None:
        """Factorise ``W`` for ``gamma h = gh`` with the Jacobian at ``u`` (None: keep the last one)."""
        sysm = self.system
        if u is not None or self._jac is None:
            self._jac = sysm.jacobian_data(u) if sysm.lumped else sysm.mass_jacobian(u)
            self.njev += 1
        if sysm.lumped:
            data = -gh * self._jac[self._map]
            data[self._diag] += 1.0
            # CSR data of W read as CSC is W^T: factorise that and solve with trans="T".
            size = sysm.n * sysm.m
            wt = sp.csc_matrix((data, self._indices, self._indptr), shape=(size, size))
            trans = "T"
        else:
            wt = (self._mass - gh * self._jac).tocsr()[self._perm][:, self._perm].tocsc()
            trans = "N"
        try:
            self._lu = spla.splu(wt, permc_spec="NATURAL", diag_pivot_thresh=0.1)
        except RuntimeError as err:
            raise BackendError(str(err)) from err
        self._trans = trans
        self.nlu += 1

    def solve(self, r: np.ndarray) -> np.ndarray:
        """``W^-1 r`` for ``r (n, m)``."""
        out = np.empty(r.size)
        out[self._perm] = self._lu.solve(r.ravel()[self._perm], trans=self._trans)
        return out.reshape(r.shape)


def line_order(disc: Discretisation) -> np.ndarray | None:
    """Nodes of a 1D mesh sorted by coordinate, if ``K`` and ``M`` couple only neighbours in that order; else None."""
    if disc.dim != 1:
        return None
    order = np.argsort(disc.coords[:, 0], kind="stable")
    rank = np.empty_like(order)
    rank[order] = np.arange(order.size)
    for matrix in (disc.stiffness, disc.mass):
        csr = sp.csr_matrix(matrix)
        rows = np.repeat(rank, np.diff(csr.indptr))
        if csr.nnz and np.abs(rows - rank[csr.indices]).max() > 1:
            return None
    return order


@_backend("banded")
class BandedLU:
    """``W = B - gamma h J(u)`` in LAPACK band storage, factorised by ``dgbtrf`` (1D meshes); reused like `SparseLU`.

    Nodes go in coordinate order with the species of a node together, so ``W`` has ``n`` sub- and
    super-diagonals for a lumped mass (``2n - 1`` for a consistent one). On 1000 cells with 2 species a
    factorisation, band fill included, took 87 us against 550 us for SuperLU (``benchmarks/bench_kernels.py``).
    """

    cheap_rescale = False
    cheap_jacobian = False
    exact = True

    def __init__(self, system: MolSystem) -> None:
        order = line_order(system.disc)
        if order is None:
            msg = "backend `banded` needs a 1D mesh whose stiffness couples only neighbouring nodes."
            raise ValueError(msg)
        self.system = system
        self.njev = 0
        self.nlu = 0
        self._jac = None
        n, m = system.n, system.m
        self._perm = (order[:, None] + m * np.arange(n)[None, :]).ravel()  # new index -> old index
        self._rank = np.empty_like(self._perm)
        self._rank[self._perm] = np.arange(self._perm.size)
        self._half = n if system.lumped else 2 * n - 1  # sub- = super-diagonals of W
        self._rows = 3 * self._half + 1  # LAPACK's ldab: kl extra rows for the pivoting fill
        if system.lumped:
            indptr, indices = system.pattern
            self._flat = self._positions(np.repeat(np.arange(n * m), np.diff(indptr)), indices)
            self._diag = self._positions(np.arange(n * m), np.arange(n * m))
        else:
            self._mass = sp.block_diag([system.disc.mass] * n, format="csr")

    def _positions(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """Flat (column-major) positions in the band array of the entries ``(rows, cols)`` of the unpermuted ``W``."""
        r, c = self._rank[rows], self._rank[cols]
        if np.abs(r - c).max(initial=0) > self._half:
            msg = "`W` is wider than its band: the mesh is not a chain of neighbouring nodes."
            raise BackendError(msg)
        return c * self._rows + (2 * self._half + r - c)

    def update(self, u: np.ndarray | None, gh: float) -> None:
        """Factorise ``W`` for ``gamma h = gh`` with the Jacobian at ``u`` (None: keep the last one)."""
        sysm = self.system
        if u is not None or self._jac is None:
            self._jac = sysm.jacobian_data(u) if sysm.lumped else sysm.mass_jacobian(u)
            self.njev += 1
        half, size = self._half, self._rows * sysm.n * sysm.m
        band = np.zeros(size + 2 * half)  # 2 half spare: room for the shifted view of L below
        if sysm.lumped:
            band[self._flat] = -gh * self._jac
            band[self._diag] += 1.0
        else:
            w = (self._mass - gh * self._jac).tocoo()
            np.add.at(band, self._positions(w.row, w.col), w.data)
        ab = band[:size].reshape(-1, self._rows).T  # Fortran-ordered (ldab, N) view
        lu, piv, info = _gbtrf(ab, half, half, overwrite_ab=True)
        if info != 0:  # an exactly zero pivot; non-finite entries show in the stages and are rejected there
            msg = f"banded factorisation of W failed (LAPACK info {info})"
            raise BackendError(msg)
        self._lu, self._piv = lu, piv
        self._triangles = None
        if np.array_equal(piv, np.arange(piv.size)) and np.shares_memory(lu, band):
            # step: no row was swapped, so W = L U with banded L and U: two dtbsv calls solve it in 60 % of the
            # time of dgbtrs, which calls BLAS once per column to apply its interchanges (bench_kernels.py). U is
            # rows 0 .. 2 half of the factor; L's multipliers, rows 2 half + 1 .., are read through a view
            # shifted by 2 half entries, whose row 0 (U's diagonal) dtbsv ignores for a unit L
            self._triangles = band[2 * half :].reshape(-1, self._rows).T, lu
        self.nlu += 1

    def solve(self, r: np.ndarray) -> np.ndarray:
        """``W^-1 r`` for ``r (n, m)``."""
        b, half = r.ravel()[self._perm], self._half
        if self._triangles is not None:
            lower, upper = self._triangles
            x = _tbsv(2 * half, upper, _tbsv(half, lower, b, lower=1, diag=1, overwrite_x=1), overwrite_x=1)
        else:
            x, _ = _gbtrs(self._lu, half, half, b, self._piv, overwrite_b=True)
        out = np.empty(r.size)
        out[self._perm] = x
        return out.reshape(r.shape)


class NodeBlocks:
    """The reaction factor ``I - gamma h S J_r``: one ``n x n`` block per node, inverted in a batch.

    ``S`` scales each node's block so that ``gamma h ||S J_r||_inf <= theta`` (see `CosineFactored`). A row
    ``w`` with ``w^T J_r = 0`` gives ``w^T (I - gamma h S J_r) = w^T``: the factor keeps conserved totals.
    Made once per Jacobian; `rescale` re-inverts for a new ``gamma h`` (for 2 species in closed form, on
    contiguous component arrays: 47 us against 635 us for a batched ``np.linalg.inv`` on 4096 nodes,
    ``benchmarks/bench_kernels.py``).
    """

    def __init__(self, jr: np.ndarray, theta: float) -> None:
        self.n = jr.shape[1]
        self.theta = float(theta)
        self._jr = jr  # (m, n, n)
        self._norm = np.abs(jr).sum(axis=2).max(axis=1)  # per-node infinity norm
        if self.n == 2:
            self._parts = [np.ascontiguousarray(jr[:, i, j]) for i in (0, 1) for j in (0, 1)]

    def rescale(self, gh: float) -> None:
        """Invert the blocks for ``gamma h = gh``; raise `BackendError` if one is singular."""
        with np.errstate(divide="ignore"):
            s = gh * np.minimum(1.0, self.theta / (gh * self._norm))
        if self.n == 2:
            j00, j01, j10, j11 = self._parts
            a, b, c, d = 1.0 - s * j00, -s * j01, -s * j10, 1.0 - s * j11
            with np.errstate(all="ignore"):
                r = 1.0 / (a * d - b * c)
            self._inv2 = [d * r, -b * r, -c * r, a * r]
            finite = np.all(np.isfinite(r))
        else:
            block = np.eye(self.n)[None] - s[:, None, None] * self._jr
            try:
                self._inv = 1.0 / block if self.n == 1 else np.linalg.inv(block)
            except np.linalg.LinAlgError as err:
                raise BackendError(str(err)) from err
            finite = np.all(np.isfinite(self._inv))
        if not finite:
            msg = "singular reaction block in W"
            raise BackendError(msg)

    def solve(self, z: np.ndarray) -> np.ndarray:
        """The blocks' inverse applied node by node to ``z (n, m)``."""
        if self.n == 2:
            i00, i01, i10, i11 = self._inv2
            out = np.empty_like(z)
            np.multiply(i00, z[0], out=out[0])
            out[0] += i01 * z[1]
            np.multiply(i10, z[0], out=out[1])
            out[1] += i11 * z[1]
            return out
        if self.n == 1:
            return self._inv[:, 0, 0] * z
        return np.einsum("mij,jm->im", self._inv, z)


def _combine(base: np.ndarray | None, terms: tuple[tuple[int, float], ...], us: list[np.ndarray]) -> np.ndarray:
    """``base + sum_k coef_k us[j_k]`` over ``terms = ((j_k, coef_k), ...)`` (``base`` None: zero), in place."""
    if base is None:
        (j, coef), terms = terms[0], terms[1:]
        out = coef * us[j]
    else:
        out = base.copy()
    for j, coef in terms:
        out += coef * us[j]
    return out


def _dot(a: np.ndarray, b: np.ndarray) -> float:
    """``a @ b`` for vectors without BLAS (its threads cost milliseconds per call on a loaded machine: measured)."""
    return float(np.einsum("i,i", a, b))


def _gmres(apply_w, precondition, r: np.ndarray, k: int, eta: float = 0.0) -> np.ndarray:
    """At most ``k`` steps of right-preconditioned GMRES for ``W x = r`` from ``x0 = P^-1 r`` (no restart).

    Stops early once the residual is at most ``eta ||r||``. If ``P`` and ``W`` both keep a total
    (``1^T P = 1^T W = 1^T B``), so does every iterate: the residual of ``x0`` and all Krylov directions
    have zero total.
    """
    x0 = precondition(r)
    res = (r - apply_w(x0)).ravel()
    beta = np.sqrt(_dot(res, res))
    goal = eta * np.sqrt(_dot(r.ravel(), r.ravel()))
    if beta <= goal or not np.isfinite(beta):
        return x0
    basis, dirs = [res / beta], []
    hess = np.zeros((k + 1, k))
    rhs = np.zeros(k + 1)
    rhs[0] = beta
    y = np.zeros(0)
    for j in range(k):
        z = precondition(basis[j].reshape(r.shape))
        dirs.append(z)
        v = apply_w(z).ravel()
        for i in range(j + 1):
            hess[i, j] = _dot(basis[i], v)
            v = v - hess[i, j] * basis[i]
        hess[j + 1, j] = np.sqrt(_dot(v, v))
        y, *_ = np.linalg.lstsq(hess[: j + 2, : j + 1], rhs[: j + 2], rcond=None)
        left = np.linalg.norm(rhs[: j + 2] - hess[: j + 2, : j + 1] @ y)
        if hess[j + 1, j] <= 1e-14 * beta or left <= goal:
            break
        basis.append(v / hess[j + 1, j])
    return x0 + sum(yi * zi for yi, zi in zip(y, dirs, strict=True))


@_backend("split")
class SpeciesFactored:
    """Exact ``W = B - gamma h J`` solved by GMRES, preconditioned by per-species diffusion solves and node blocks.

    The preconditioner is the approximate factorisation ``P = (B + gamma h D K)(I - gamma h S J_r)``. Its
    diffusion factor is block-diagonal over species, each block ``M + gamma h D_i K`` symmetric positive
    definite (``M`` the lumped or consistent mass) and independent of the state. ``species`` says how these
    blocks are solved:

    - ``"multigrid"`` (default where the mesh carries a hierarchy, `Discretisation.prolongations`: the disk,
      P1 rectangles whose cell counts halve): one
      geometric V-cycle (`solvers.multigrid.Multigrid`), remade for every step size at the cost of a few
      vector operations, so no factorisation at all.
    - ``"superlu"`` (default elsewhere): SuperLU in nested-dissection order, factorised only when the step
      size leaves a ratio ``reuse`` of one already factorised (the last ``cache`` are kept).

    A new Jacobian costs only the ``n x n`` node blocks (`NodeBlocks`), so one is taken at every step.
    ``krylov`` GMRES steps on the exact sparse ``W`` (one by default) then remove most of the splitting
    error ``gamma^2 h^2 D K S J_r`` (and the V-cycle's error). ``P``, ``W`` and hence every GMRES iterate
    keep conserved totals (``1^T K = 0``, ``w^T J_r = 0``; the V-cycle is shifted to keep them too). With
    ``krylov=0`` the plain factorisation is ``W`` (a valid W-method, any ``W`` keeps the order) and the
    stepper's dead band decides when to refactorise. Once the relative rate falls below ``rest`` the stepper
    hands over to ``"lu"`` (see `RosenbrockW._maybe_switch`): with large steps near rest one GMRES step leaves
    stiff modes barely damped and the rate hovered at 1e-5 .. 1e-4 up to t = 5000 on the 3169-node disk
    (measured, SuperLU species solves); GMRES solved to a residual of 1e-3 settled but cost more than the
    handover. Runs to a settled state (rate 1e-6) on the 12481-node disk, ``benchmarks/bench_settle.py``:
    at rtol 1e-4, 1.9 s with ``rest = 3e-5`` against 2.8 s with 1e-3 (multigrid), 3.3 s against 3.7 s
    (SuperLU); at rtol 1e-3, 1.0 s against 1.4 s, 1.9 s against 2.1 s; final states within the settle
    tolerance's reach of each other (1e-6 .. 5e-5). With ``rest = 0`` (no handover on the rate) it did not
    settle by t = 1e4 (measured once, ad hoc).

    Measured on the 12481-node P1 disk (``benchmarks/bench_solvers.py``: t = 200, one BLAS thread, loosest
    tolerance of its ladder with final-state error below 1e-3): multigrid 15 steps, 0.46 s at error 8.9e-4;
    SuperLU 13 steps, 5 factorisations per species, 0.94 s at 5.5e-4; scipy's BDF with the analytic
    Jacobian 4.7 s. On a 64 x 64 P1 square (4225 nodes): 0.23 s against 0.28 s with SuperLU and 0.77 s for BDF.
    """

    cheap_rescale = False
    exact = False

    def __init__(self, system: MolSystem, theta: float = np.inf, cache: int = 4, krylov: int = 1,
                 reuse: float = 3.0, rest: float = 3e-5, species: str = "auto") -> None:
        if species == "auto":
            species = "multigrid" if system.disc.prolongations else "superlu"
        if species not in ("multigrid", "superlu"):
            msg = f"`species` must be 'multigrid', 'superlu' or 'auto', got {species!r}."
            raise ValueError(msg)
        self.system = system
        self.species = species
        self.njev = 0
        self.nlu = 0
        self.theta = float(theta)
        self.cache = max(1, int(cache))
        self.krylov = int(krylov)
        self.rest = float(rest)
        # With GMRES on the exact W the factors only precondition: a factor made for a step size within a
        # ratio `reuse` of the current one is kept, and the step size may change at every step.
        self.reuse = float(reuse) if self.krylov else 1.0
        self.cheap_rescale = self.cheap_jacobian = self.krylov > 0
        disc = system.disc
        stiffness = sp.csr_matrix(system.stiffness)
        mass = sp.diags(disc.weights) if system.lumped else sp.csr_matrix(disc.mass)
        if species == "multigrid":
            self._order = None
            self._grids = [None if d == 0.0 else Multigrid(mass, stiffness, disc.prolongations)
                           for d in system.diffusion]
        else:
            self._order = dissection_order(disc.coords, stiffness)
            self._mass = sp.csr_matrix(mass)[self._order][:, self._order].tocsc()
            self._stiffness = stiffness[self._order][:, self._order].tocsc()
        self._factors: dict[float, list] = {}
        self._jr = None

    def _factor(self, gh: float) -> list:
        """Per-species solvers of ``M + gh D_i K`` (None where ``D_i = 0``), by `species`.

        SuperLU factors are cached by ``gh``; one for a ``gh`` within the ratio ``reuse`` is returned instead.
        """
        if self.species == "multigrid":
            for d, grid in zip(self.system.diffusion, self._grids, strict=True):
                if grid is not None:
                    grid.update(gh * d)
            return self._grids
        if self._factors:
            near = min(self._factors, key=lambda g: abs(np.log(g / gh)))
            if abs(np.log(near / gh)) <= np.log(self.reuse):
                return self._factors[near]
        lus = []
        for d in self.system.diffusion:
            if d == 0.0:
                lus.append(None)
                continue
            try:
                lus.append(spla.splu((self._mass + (gh * d) * self._stiffness).tocsc(), permc_spec="NATURAL",
                                     diag_pivot_thresh=0.0, options={"SymmetricMode": True}))
            except RuntimeError as err:
                raise BackendError(str(err)) from err
        self.nlu += 1
        if len(self._factors) >= self.cache:
            self._factors.pop(next(iter(self._factors)))
        self._factors[gh] = lus
        return lus

    def update(self, u: np.ndarray | None, gh: float) -> None:
        """Make both factors for ``gamma h = gh``, with the reaction Jacobian at ``u`` (None: keep it)."""
        if u is not None or self._jr is None:
            jr = np.asarray(self.system.jacobian(u), dtype=float)
            self._jr = np.moveaxis(jr, 2, 0)  # (m, n, n)
            if self.krylov:
                self._jac = self.system.mass_jacobian(u, jr=jr)
            self._blocks = NodeBlocks(self._jr, self.theta)
            self.njev += 1
        self._lus = self._factor(gh)
        self._blocks.rescale(gh)
        self._gh = gh

    def solve(self, r: np.ndarray) -> np.ndarray:
        """``W^-1 r`` for ``r (n, m)``: the split solve, improved by ``krylov`` GMRES steps on the full ``W``."""
        if not self.krylov:
            return self._split_solve(r)
        sysm, gh = self.system, self._gh

        def apply_w(x):
            return sysm.apply_mass(x) - gh * (self._jac @ x.ravel()).reshape(x.shape)

        return _gmres(apply_w, self._split_solve, r, self.krylov)

    def _split_solve(self, r: np.ndarray) -> np.ndarray:
        """The approximate factorisation's solve: the species' diffusion solves, then the node blocks."""
        sysm, order = self.system, self._order
        z = np.empty_like(r)
        for i, lu in enumerate(self._lus):
            rhs = r[i] * sysm.disc.weights if sysm.lumped else r[i]
            if lu is None:
                z[i] = r[i] if sysm.lumped else sysm.solve_mass(r[i : i + 1])[0]
            elif order is None:
                z[i] = lu.solve(rhs)
            else:
                z[i, order] = lu.solve(np.ascontiguousarray(rhs[order]))
        return self._blocks.solve(z)


def cosine_eigenvalues(disc: Discretisation) -> np.ndarray:
    """Eigenvalues of ``M^-1 K`` on a uniform finite-volume grid, shaped like the grid (DCT-II order).

    For ``N`` cells of width ``dx`` they are ``(2 - 2 cos(pi k / N)) / dx^2`` per direction, summed over
    directions; the eigenvectors are the type-2 cosine modes ``cos(pi k (j + 1/2) / N)``.
    """
    axes = []
    for cells, length in zip(disc.grid, disc.size, strict=True):
        dx = length / cells
        axes.append((2.0 - 2.0 * np.cos(np.pi * np.arange(cells) / cells)) / dx**2)
    return sum(np.meshgrid(*axes, indexing="ij", sparse=True))


def cosine_applies(disc: Discretisation, rng_seed: int = 0) -> bool:
    """Whether ``M^-1 K`` of ``disc`` is the uniform-grid Neumann Laplacian that the cosine transform diagonalises.

    Checked, not assumed: apply both to a random vector and compare.
    """
    if disc.grid is None or not disc.lumped or disc.method != "fv" or len(disc.grid) != len(disc.size):
        return False
    if int(np.prod(disc.grid)) != disc.m:
        return False
    v = np.random.default_rng(rng_seed).standard_normal(disc.grid)
    lap = sp.diags(1.0 / disc.weights) @ sp.csr_matrix(disc.stiffness)
    direct = (lap @ v.ravel()).reshape(disc.grid)
    axes = tuple(range(v.ndim))
    spectral = sfft.idctn(cosine_eigenvalues(disc) * sfft.dctn(v, type=2, norm="ortho", axes=axes),
                          type=2, norm="ortho", axes=axes)
    return bool(np.linalg.norm(direct - spectral) <= 1e-9 * np.linalg.norm(direct))


@_backend("dct")
class CosineFactored:
    """``W = (I + gamma h D Lambda)(I - gamma h S J_r)``: cosine-transform diffusion, bounded node-block reactions.

    The diffusion factor is diagonal after a type-2 cosine transform (exact for the uniform Neumann
    finite-volume Laplacian); the reaction factor is a small ``n x n`` block per node. ``S`` scales each
    node's block so that ``gamma h ||S J_r|| <= theta``: the full approximate factorisation carries an
    error ``gamma^2 h^2 D Lambda J_r`` that, once ``gamma h |J_r|`` is large, over-damps the coupled modes
    and makes the step stall far from a steady state (measured: the relative rate stayed at 0.1 while
    the step grew to 800). With the bound, the reaction is linearly implicit while ``gamma h |J_r|`` is
    small and the rest of it is explicit and watched by the error control. Any ``W`` keeps the order.
    """

    cheap_rescale = True
    cheap_jacobian = False
    exact = False
    #: relative rate below which the stepper hands over to "lu" (see `RosenbrockW._maybe_switch`)
    rest = 1e-3

    def __init__(self, system: MolSystem, theta: float = 1.0) -> None:
        if not cosine_applies(system.disc):
            msg = "backend `dct` needs a uniform finite-volume grid with lumped mass (`disc.grid`)."
            raise ValueError(msg)
        self.system = system
        self.njev = 0
        self.nlu = 0
        self.theta = float(theta)
        self._grid = tuple(system.disc.grid)
        shape = (-1,) + (1,) * len(self._grid)
        self._lam = cosine_eigenvalues(system.disc)[None] * system.diffusion.reshape(shape)
        self._axes = tuple(range(1, 1 + len(self._grid)))
        self._blocks = None

    def update(self, u: np.ndarray | None, gh: float) -> None:
        """Rebuild both factors for ``gamma h = gh``, with the reaction Jacobian at ``u`` (None: keep it)."""
        if u is not None or self._blocks is None:
            jr = np.moveaxis(np.asarray(self.system.jacobian(u), dtype=float), 2, 0)  # (m, n, n)
            self._blocks = NodeBlocks(jr, self.theta)
            self.njev += 1
        self._blocks.rescale(gh)
        self._gh = gh
        self._diag = 1.0 / (1.0 + gh * self._lam)
        self.nlu += 1

    def solve(self, r: np.ndarray) -> np.ndarray:
        """``W^-1 r`` for ``r (n, m)``: diffusion factor by cosine transforms, then the node blocks."""
        n = self.system.n
        x = r.reshape((n,) + self._grid)
        z = sfft.idctn(self._diag * sfft.dctn(x, type=2, norm="ortho", axes=self._axes),
                       type=2, norm="ortho", axes=self._axes).reshape(n, -1)
        return self._blocks.solve(z)


def exact_backend(disc: Discretisation) -> str:
    """The backend with the exact ``W`` for the mesh: ``"banded"`` on chains of nodes (1D), ``"lu"`` elsewhere."""
    return "banded" if line_order(disc) is not None else "lu"


def choose_backend(disc: Discretisation) -> str:
    """``"banded"`` on 1D meshes, ``"dct"`` on uniform finite-volume grids in 2D, ``"split"`` on other 2D meshes.

    In 1D the exact banded LU costs about as much per step as the transforms, and its exact ``W`` takes far
    larger steps near a steady state (measured; see the module docstring). On the 12481-node P1 disk
    ``"split"`` with SuperLU species solves took 0.85 s against 1.7 s for ``"lu"`` at equal error (measured),
    and with multigrid species solves it takes half that again (see `SpeciesFactored`).
    """
    if disc.dim < 2:
        return exact_backend(disc)
    return "dct" if cosine_applies(disc) else "split"


# ---- the stepper -------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Tableau:
    """A Rosenbrock W-method in the transformed form that needs no Jacobian products.

    Stage ``i``: ``W u_i = gamma h F(u_n + sum_j a_ij u_j) + B sum_j c_ij u_j`` with ``W = B - gamma h A``;
    ``u_{n+1} = u_n + sum_i m_i u_i``, error estimate ``sum_i e_i u_i`` (``a``, ``c`` strictly lower).
    ``A`` appears only in ``W``, so any approximation of the Jacobian (a stale one, an approximate
    factorisation) is allowed: the order holds for every ``A``.
    """

    name: str
    gamma: float
    a: np.ndarray
    c: np.ndarray
    m: np.ndarray
    e: np.ndarray
    order: int
    embedded_order: int

    @property
    def stages(self) -> int:
        """Number of stages (linear solves per step)."""
        return self.m.size


def transformed(name: str, gamma: float, alpha, gam, b, bhat, order: int) -> Tableau:
    """Build a `Tableau` from the usual ``(alpha, gamma_ij, b, bhat)`` coefficients (Hairer & Wanner IV.7)."""
    alpha, gam = np.asarray(alpha, float), np.asarray(gam, float)
    full = gam + gamma * np.eye(len(b))
    inv = np.linalg.inv(full)
    return Tableau(
        name=name,
        gamma=gamma,
        a=alpha @ inv,
        c=-gamma * np.tril(inv, -1),
        m=np.asarray(b, float) @ inv,
        e=(np.asarray(b, float) - np.asarray(bhat, float)) @ inv,
        order=order,
        embedded_order=order - 1,
    )


_G2 = 1.0 + 1.0 / np.sqrt(2.0)
_G34 = 4.3586652150845900e-01

TABLEAUS: dict[str, Tableau] = {
    # Verwer, Spee, Blom & Hundsdorfer (1999): W k1 = F(u), W k2 = F(u + h k1) - 2 B k1, error against Euler.
    "ros2": Tableau(
        name="ros2",
        gamma=_G2,
        a=np.array([[0.0, 0.0], [1.0 / _G2, 0.0]]),
        c=np.array([[0.0, 0.0], [-2.0, 0.0]]),
        m=np.array([1.5, 0.5]) / _G2,
        e=np.array([0.5, 0.5]) / _G2,
        order=2,
        embedded_order=1,
    ),
    # Rang & Angermann (2005, BIT 45, "New Rosenbrock W-methods of order 3 for partial differential
    # algebraic equations of index 1"): ROS34PW2, order 3 (embedded 2) for any W, L-stable, stiffly accurate.
    "ros34pw2": transformed(
        "ros34pw2",
        _G34,
        [[0, 0, 0, 0],
         [8.7173304301691801e-01, 0, 0, 0],
         [8.4457060015369423e-01, -1.1299064236484185e-01, 0, 0],
         [0, 0, 1.0, 0]],
        [[0, 0, 0, 0],
         [-8.7173304301691801e-01, 0, 0, 0],
         [-9.0338057013044082e-01, 5.4180672388095326e-02, 0, 0],
         [2.4212380706095346e-01, -1.2232505839045147e00, 5.4526025533510214e-01, 0]],
        [2.4212380706095346e-01, -1.2232505839045147e00, 1.5452602553351020e00, 4.3586652150845900e-01],
        [3.7810903145819369e-01, -9.6042292212423178e-02, 0.5, 2.1793326075422950e-01],
        order=3,
    ),
}


class HermiteDense(DenseOutput):
    """Cubic Hermite interpolant from the states and rates at both ends of a step (keeps linear totals)."""

    def __init__(self, t_old: float, t: float, y0, y1, f0, f1) -> None:
        super().__init__(t_old, t)
        self.h = t - t_old
        self.y0, self.y1, self.f0, self.f1 = y0, y1, f0, f1

    def _call_impl(self, t):
        s = (np.asarray(t, dtype=float) - self.t_old) / self.h
        h00 = (1 + 2 * s) * (1 - s) ** 2
        h10 = s * (1 - s) ** 2
        h01 = s * s * (3 - 2 * s)
        h11 = s * s * (s - 1)
        out = (np.multiply.outer(self.y0, h00) + np.multiply.outer(self.f0, self.h * h10)
               + np.multiply.outer(self.y1, h01) + np.multiply.outer(self.f1, self.h * h11))
        return out


class RosenbrockW(OdeSolver):
    """A Rosenbrock W-method on a `MolSystem`, following scipy's `OdeSolver` contract (``y`` is flattened).

    Parameters
    ----------
    system : the semi-discrete system.
    t0, y0, t_bound : start time, flattened start state, end time.
    rtol, atol : local error tolerances (weighted RMS over nodes and species).
    backend : a key of `BACKENDS` or ``"auto"`` (cosine transform where it applies).
    first_step, max_step : step-size limits; ``first_step`` None picks one from the rate at ``y0``.
    fixed_step : take steps of exactly this size with no error control (for convergence studies).
    jac_every : refresh the Jacobian at least this often (accepted steps).
    backend_options : keyword arguments for the backend (``"dct"``: ``theta``).
    scheme : a key of `TABLEAUS`.
    rest_rate : relative rate below which a stability-limited approximate ``W`` hands over to ``"lu"``
        (default ``30 rtol``).
    """

    def __init__(
        self,
        system: MolSystem,
        t0: float,
        y0: np.ndarray,
        t_bound: float,
        *,
        rtol: float = 1e-4,
        atol: float = 1e-8,
        backend: str = "auto",
        first_step: float | None = None,
        max_step: float = np.inf,
        fixed_step: float | None = None,
        jac_every: int = 10,
        backend_options: dict | None = None,
        scheme: str = "ros34pw2",
        rest_rate: float | None = None,
    ) -> None:
        super().__init__(system.rhs, t0, y0, t_bound, vectorized=False)
        if t_bound <= t0:
            msg = f"`t_bound` must exceed `t0` (forward integration only), got {t_bound!r} <= {t0!r}."
            raise ValueError(msg)
        if backend == "auto":
            backend = choose_backend(system.disc)
        if backend not in BACKENDS:
            msg = f"`backend` must be one of {sorted(BACKENDS)} or 'auto', got {backend!r}."
            raise ValueError(msg)
        if scheme not in TABLEAUS:
            msg = f"`scheme` must be one of {sorted(TABLEAUS)}, got {scheme!r}."
            raise ValueError(msg)
        self.tableau = TABLEAUS[scheme]
        self._expo = 1.0 / (self.tableau.embedded_order + 1)
        tab = self.tableau

        def terms(row) -> tuple[tuple[int, float], ...]:
            return tuple((j, float(x)) for j, x in enumerate(row) if x != 0.0)

        # per stage, the nonzero (stage, coefficient) pairs of a and c; then those of m and e
        self._plan = [(terms(tab.a[i, :i]), terms(tab.c[i, :i])) for i in range(tab.stages)]
        self._plan_m, self._plan_e = terms(tab.m), terms(tab.e)
        self.system = system
        self.backend = BACKENDS[backend](system, **(backend_options or {}))
        self.rtol, self.atol = float(rtol), float(atol)
        self.max_step = float(max_step)
        self.fixed_step = fixed_step
        self.jac_every = int(jac_every)
        self.rest_rate = float(30 * rtol if rest_rate is None else rest_rate)
        self._recent: list[bool] = []  # whether each of the last accepted steps had a surprise rejection
        self._err_last, self._h_last = 1.0, 1.0
        self._spent = (0, 0)  # (njev, nlu) of backends already left behind
        self._w = system.disc.weights / system.disc.weights.sum()
        self.u = self.y.reshape(system.shape).copy()
        self.y = self.u.ravel()
        self.force = system.force(self.u)
        self.nfev = 1
        self.nrejected = 0
        self.dudt = system.solve_mass(self.force)
        self._gh = None
        self._age = 0
        self._fresh = False
        self.t_old = None
        self._prev = None
        if fixed_step is not None:
            self.h = float(fixed_step)
        elif first_step is not None:
            self.h = float(first_step)
        else:
            self.h = self._initial_step()
        self.h = min(self.h, self.max_step, self.t_bound - self.t)

    def _scale(self, u: np.ndarray, v: np.ndarray) -> np.ndarray:
        return self.atol + self.rtol * np.maximum(np.abs(u), np.abs(v))

    def _norm(self, e: np.ndarray, sc: np.ndarray) -> float:
        """Weighted RMS of ``e / sc`` over nodes (node weights) and species."""
        q = e / sc
        return float(np.sqrt(np.sum((q * q) @ self._w) / q.shape[0]))

    def _initial_step(self) -> float:
        sc = self._scale(self.u, self.u)
        d0, d1 = self._norm(self.u, sc), self._norm(self.dudt, sc)
        h = 1e-6 if d0 < 1e-5 or d1 < 1e-5 else 0.01 * d0 / d1
        return max(h, 1e-12 * max(1.0, abs(self.t)))

    band = (0.5, 1.2)  # step-size ratios h / h_W over which a factorised W is kept (wider: measured less accurate)

    def _prepare(self, h: float, refresh: bool) -> None:
        """Make ``W`` valid for step ``h``: rebuild when the step left the dead band or the Jacobian aged.

        After a rejection (``refresh``) the Jacobian is renewed unless it is already the current one.
        """
        gh = self.tableau.gamma * h
        stale = self._age >= self.jac_every or (refresh and self._age > 0)
        if self.backend.cheap_jacobian:
            # step: a Jacobian costs no factorisation here: take it at every new state or step size
            if self._age > 0 or gh != self._gh:
                self.backend.update(self.u, gh)
                self._gh, self._age = gh, 0
        elif stale or self._gh is None:
            self.backend.update(self.u, gh)
            self._gh, self._age = gh, 0
        elif self.backend.cheap_rescale:
            if gh != self._gh:
                self.backend.update(None, gh)
                self._gh = gh
        elif not (self.band[0] * self._gh <= gh <= self.band[1] * self._gh):
            self.backend.update(self.u, gh)
            self._gh, self._age = gh, 0
        # scipy's OdeSolver counters: Jacobian evaluations and factorisations (cosine backend: factor rebuilds)
        self.njev = self._spent[0] + self.backend.njev
        self.nlu = self._spent[1] + self.backend.nlu

    def _step_impl(self):
        system = self.system
        u, f0 = self.u, self.force
        h = min(self.h, self.t_bound - self.t, self.max_step)
        if self.fixed_step is not None:
            h = min(self.fixed_step, self.t_bound - self.t)
        rejected = surprise = False
        refresh = False
        hmin = 10 * np.spacing(max(abs(self.t), abs(self.t_bound)))
        while True:
            if h < hmin:
                return False, f"step size {h:.3g} fell below the minimum at t = {self.t:.6g}"
            with np.errstate(all="ignore"):
                try:
                    self._prepare(h, refresh)
                    # The factorisation may be for a nearby step size: W = B - gamma h_W A is a valid W-method.
                    u_new, err_vec = self._stages(u, f0, h)
                except BackendError:
                    u_new = err_vec = np.full_like(u, np.nan)
                err = self._norm(err_vec, self._scale(u, u_new))
            if not np.isfinite(err):
                h, rejected, refresh = 0.25 * h, True, True
                self.nrejected += 1
                continue
            if self.fixed_step is None and err > 1.0:
                # A surprise: far more error than the last accepted step predicts for a smooth solution.
                predicted = self._err_last * (h / self._h_last) ** (1 / self._expo)
                surprise = surprise or err > 10.0 * max(1.0, predicted)
                h *= max(0.2, 0.9 * err**-self._expo)
                rejected, refresh = True, True
                self.nrejected += 1
                continue
            with np.errstate(all="ignore"):
                f_new = system.force(u_new)
            self.nfev += 1
            if not np.all(np.isfinite(f_new)):
                h, rejected, refresh = 0.25 * h, True, True
                self.nrejected += 1
                continue
            break
        # step: accept, then propose the next step size
        dudt_new = system.solve_mass(f_new)
        self._prev = (self.t, u, self.dudt)
        self.t = self.t + h
        self.u, self.force, self.dudt = u_new, f_new, dudt_new
        self.y = u_new.ravel()
        self._age += 1
        self._recent = (self._recent + [surprise])[-10:]
        self._err_last, self._h_last = err, h
        self._maybe_switch()
        if self.fixed_step is None:
            grow = 5.0 if err < 1e-10 else min(5.0, 0.9 * err**-self._expo)
            self.h = h * (min(1.0, grow) if rejected else max(0.2, grow))
        return True, None

    def _stages(self, u: np.ndarray, f0: np.ndarray, h: float) -> tuple[np.ndarray, np.ndarray]:
        """One step of the tableau from ``u`` (with ``F(u) = f0``): the new state and the error vector."""
        system, solve = self.system, self.backend.solve
        gh = self.tableau.gamma * h
        us: list[np.ndarray] = []
        for i, (a_terms, c_terms) in enumerate(self._plan):
            if i:
                f = system.force(_combine(u, a_terms, us))
                self.nfev += 1
            else:
                f = f0
            r = gh * f
            if c_terms:
                r += system.apply_mass(_combine(None, c_terms, us))
            us.append(solve(r))
        return _combine(u, self._plan_m, us), _combine(None, self._plan_e, us)

    def _maybe_switch(self) -> None:
        """Leave an approximate ``W`` for the exact sparse LU once the step is stability-limited near rest.

        Stability-limited: at least 2 of the last 10 accepted steps came after a *surprise* rejection, an
        error more than 10 times what the previous step predicts for a smooth solution (the sign of an
        instability, not of a lack of accuracy). Near rest: the relative rate is below ``rest_rate``
        (default ``30 rtol``: hovering at the stability limit keeps perturbations of about ``rtol`` alive,
        which move at the reaction's rates, and would hold the rate above a settle threshold for ever).
        Then the explicit remainder of the reaction, not accuracy, limits the step; with the exact ``W``
        the step can grow without bound.

        For ``"dct"`` near rest means that the rate is below the backend's ``rest``; for ``"split"``, the rate or
        the state's relative change over the last step divided by its length. The second is needed because a
        stiff residue the split ``W`` cannot damp may hold the rate up while the state stands still: on a
        817-node disk the rate stayed at 0.02 from t = 270 to 20000 over steps growing to 5e4, unsettled. On
        ``"dct"`` the same rule handed over too early (64 x 64 benchmark: 0.17 s against 0.05 s), so it is not used.
        """
        if self.backend.exact:
            return
        weights = self.system.disc.weights
        rate = relative_rate(weights, self.u, self.dudt, self.atol)
        # "split" and "dct" hand over near rest on the rate alone (their `rest`), the others after surprises:
        # on the surprise rule alone "dct" hovered at rest without settling (demo 48x48, 4232 steps unsettled;
        # with the rate rule 12 steps, settled, as with "lu")
        if self.backend.name == "split":
            t_old, u_old, _ = self._prev
            moved = relative_rate(weights, u_old, (self.u - u_old) / (self.t - t_old), self.atol)
            near_rest = min(rate, moved) < self.backend.rest
        elif self.backend.name == "dct":
            near_rest = rate < self.backend.rest
        else:
            near_rest = sum(self._recent) >= 2 and rate < self.rest_rate
        if not near_rest:
            return
        self._spent = (self.njev, self.nlu)
        self.backend = SparseLU(self.system)
        self._gh, self._recent = None, []
        self.switched_at = self.t

    switched_at: float | None = None

    def _dense_output_impl(self):
        t0, u0, d0 = self._prev
        return HermiteDense(t0, self.t, u0.ravel(), self.y, d0.ravel(), self.dudt.ravel())


# ---- the driver --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class RunResult:
    """One run of `integrate`.

    Attributes
    ----------
    t_final, u : time reached and the state there ``(n, m)``.
    status : ``"settled"`` (the settle rule fired), ``"reached-end"`` (``t_end`` reached, or an observer
        stopped the run), ``"diverged"`` (non-finite or beyond ``bounds``), ``"failed"`` (the solver gave up).
    message : what happened, in words.
    success : ``status != "failed"``: the run itself worked (a diverging model is an answer, not a failure).
    history : one row per accepted step (plus the start).
    snap_t, snap_u : ``(k,)`` and ``(k, n, m)`` snapshots at the requested times up to ``t_final``; a run
        that ended before its last requested time also gets its final state as a last snapshot.
    nsteps, nrejected, nfev, njev, nlu : work counters (``nfev`` counts every right-hand-side evaluation,
        including the one per step that the History rate costs on the scipy route; scipy's BDF does not
        report rejections, so ``nrejected`` is 0 there).
    """

    t_final: float
    u: np.ndarray
    status: str
    message: str
    success: bool
    history: History
    snap_t: np.ndarray
    snap_u: np.ndarray
    nsteps: int
    nrejected: int
    nfev: int
    njev: int
    nlu: int


def _make_rdcheck(system, u0, t_end, rtol, atol, options, settle):
    solver = RosenbrockW(system, 0.0, u0.ravel(), t_end, rtol=rtol, atol=atol, **options)

    def rate(s):
        return s.dudt, 0

    def rejected(s):
        return s.nrejected

    return solver, rate, rejected


def _make_bdf(system, u0, t_end, rtol, atol, options, settle):
    system._require_lumped("method 'scipy-bdf'")
    solver = BDF(system.rhs, 0.0, u0.ravel(), t_end, rtol=rtol, atol=atol, jac=system.jac, **options)

    def rate(s):
        return system.rhs(s.t, s.y).reshape(system.shape), 1

    def rejected(s):
        return 0

    return solver, rate, rejected


METHODS: dict[str, Callable] = {"rdcheck": _make_rdcheck, "scipy-bdf": _make_bdf}


def _snapshot_times(snapshots: int | Sequence[float], t_end: float) -> np.ndarray:
    if isinstance(snapshots, (int, np.integer)):
        if snapshots < 0:
            msg = f"`snapshots` must be a non-negative count or a sequence of times, got {snapshots!r}."
            raise ValueError(msg)
        return np.linspace(0.0, t_end, int(snapshots)) if snapshots != 1 else np.array([t_end])
    times = np.sort(np.asarray(snapshots, dtype=float).ravel())
    if times.size and (times[0] < 0 or times[-1] > t_end):
        msg = f"`snapshots` times must lie in [0, t_end = {t_end}], got [{times[0]}, {times[-1]}]."
        raise ValueError(msg)
    return times


class _Recorder:
    """History rows, kept as lists until the run ends."""

    def __init__(self, weights: np.ndarray, probe: np.ndarray) -> None:
        self.w = weights / weights.sum()
        self.nodes = probe
        self.t, self.mean, self.lo, self.hi, self.rate, self.probe = [], [], [], [], [], []

    def add(self, t: float, u: np.ndarray, rate: float) -> float:
        """Record one row; return ``max |u|`` (non-finite if ``u`` is), which the driver checks for divergence."""
        lo, hi = u.min(axis=1), u.max(axis=1)
        self.t.append(t)
        self.mean.append(u @ self.w)
        self.lo.append(lo)
        self.hi.append(hi)
        self.rate.append(rate)
        self.probe.append(u[:, self.nodes])
        return float(np.maximum(hi.max(), -lo.min()))  # np.maximum, not max(): NaN must propagate

    def drop_last(self) -> None:
        """Forget the last row (a diverged state is not part of the history)."""
        for rows in (self.t, self.mean, self.lo, self.hi, self.rate, self.probe):
            rows.pop()

    def history(self) -> History:
        return History(np.array(self.t), np.array(self.mean), np.array(self.lo), np.array(self.hi),
                       np.array(self.rate), np.array(self.probe).reshape(len(self.t), -1, self.nodes.size))


def integrate(
    disc: Discretisation,
    diffusion: np.ndarray,
    reaction: Callable[[np.ndarray], np.ndarray],
    jacobian: Callable[[np.ndarray], np.ndarray],
    u0: np.ndarray,
    t_end: float,
    *,
    method: str = "rdcheck",
    rtol: float = 1e-4,
    atol: float = 1e-8,
    settle: SettleRule | None = None,
    snapshots: int | Sequence[float] = 0,
    observers: Sequence[object] = (),
    bounds: float | None = None,
    **options,
) -> RunResult:
    """Integrate ``M du_i/dt = -D_i K u_i + M f_i(u)`` from ``u0`` at ``t = 0`` towards ``t_end``.

    Parameters
    ----------
    disc : the spatial discretisation.
    diffusion : ``(n,)`` diffusion coefficients.
    reaction, jacobian : ``u (n, m) -> (n, m)`` and ``u (n, m) -> (n, n, m)``.
    u0 : ``(n, m)`` start state.
    t_end : time limit.
    method : ``"rdcheck"`` (our Rosenbrock W-method, ROS34PW2 by default) or ``"scipy-bdf"`` (scipy's
        BDF with the analytic sparse Jacobian; lumped mass only), see `METHODS`.
    rtol, atol : local error tolerances.
    settle : stop early when this rule fires (status ``settled``); None runs to ``t_end``.
    snapshots : a count of equally spaced times in ``[0, t_end]``, or the times themselves.
    observers : objects with ``initialize(state, info)``, ``handle(state, t)`` (each accepted step) and
        ``finalize(info)``; a `StopIteration` (e.g. `StopRun`) raised by ``handle`` ends the run.
    bounds : largest ``|u|`` allowed before the run counts as diverged; default ``1e6 * max(1, max|u0|)``.
    **options : passed to the stepper (`RosenbrockW`: ``scheme``, ``backend``, ``backend_options``,
        ``first_step``, ``max_step``, ``fixed_step``, ``jac_every``, ``rest_rate``; BDF: ``first_step``,
        ``max_step``).

    Returns
    -------
    RunResult; divergence and solver failure are statuses, never exceptions. With ``"rdcheck"`` a run that
    diverges is run again at ``rtol / 10`` with an exact ``W`` and that run is returned (see
    `_confirm_divergence`), so ``"diverged"`` means both diverged.
    """
    if method not in METHODS:
        msg = f"`method` must be one of {sorted(METHODS)}, got {method!r}."
        raise ValueError(msg)
    system = MolSystem(disc, diffusion, reaction, jacobian)
    u0 = np.array(u0, dtype=float)
    if u0.shape != system.shape:
        msg = f"`u0` must have shape (n, m) = {system.shape}, got {u0.shape}."
        raise ValueError(msg)
    t_end = float(t_end)
    if not t_end > 0:
        msg = f"`t_end` must be positive, got {t_end!r}."
        raise ValueError(msg)
    bound = 1e6 * max(1.0, float(np.max(np.abs(u0)))) if bounds is None else float(bounds)
    times = _snapshot_times(snapshots, t_end)
    info = {"t_start": 0.0, "t_end": t_end, "method": method, "shape": system.shape}
    for obs in observers:
        obs.initialize(u0, info)
    run = _attempt(system, u0, t_end, method, rtol, atol, settle, times, observers, bound, options)
    if run.status == "diverged" and method == "rdcheck" and "fixed_step" not in options and np.all(np.isfinite(u0)):
        run = _confirm_divergence(system, u0, t_end, rtol, atol, settle, times, observers, bound, options, run)
    done = {"status": run.status, "message": run.message, "t_final": run.t_final, "nsteps": run.nsteps}
    for obs in observers:
        obs.finalize(done)
    return run


def _confirm_divergence(system, u0, t_end, rtol, atol, settle, times, observers, bound, options, first) -> RunResult:
    """Run again at a tenth of ``rtol`` with an exact ``W``; report that run, saying what the first one did.

    At loose tolerances the error control can accept steps that leave the physical states, where the
    kinetics may then blow up: the benchmark problem of ``benchmarks/bench_solvers.py`` diverged at rtol 0.2
    to 0.3 with the approximate ``W`` of ``"dct"`` and ``"split"`` (64 x 64 grid, P1 square, disk) and at
    0.5 with the exact LU, and reached its pattern at 0.1 and below (measured). A real blow-up diverges at
    every tolerance, so `diverged` stands only when the second run diverges too; the message says which.
    """
    exact = exact_backend(system.disc)
    options = {**options, "backend": exact, "backend_options": {}}
    run = _attempt(system, u0, t_end, "rdcheck", rtol / 10, atol, settle, times, observers, bound, options)
    said = "confirmed" if run.status == "diverged" else "not confirmed"
    note = (f"diverged at t = {first.t_final:.6g} with rtol {rtol:g} ({first.nsteps} steps); {said} at rtol "
            f"{rtol / 10:g} with the exact `{exact}` backend: ")
    return replace(run, message=note + run.message)


def _longest_step(settle: SettleRule, t: float) -> float:
    """The longest step allowed at time ``t`` of a run with a settle rule: the window, or a tenth of ``t``.

    So the history keeps at least 24 rows per decade of time, and neither the settle rule nor an oscillation
    verdict rests on one huge step: a 1D run of the demo leapt from t = 1809 (rate 7e-5) to t_end = 20000 in
    one step, still by then, but with one row in its last window it ended unsettled.
    """
    return max(settle.window, 0.1 * t)


def _attempt(system, u0, t_end, method, rtol, atol, settle, times, observers, bound, options) -> RunResult:
    """One integration from ``u0``: the stepping loop of `integrate` (observers already initialised)."""
    disc = system.disc
    rec = _Recorder(disc.weights, probe_nodes(disc.coords))
    snap_t, snap_u = [], []

    with np.errstate(all="ignore"):
        if not np.all(np.isfinite(u0)):
            status, message = "diverged", "`u0` is not finite"
            solver = None
        else:
            solver, rate_of, rejected_of = METHODS[method](system, u0, t_end, rtol, atol, options, settle)
            status, message = None, ""
        extra_fev = 0
        u = u0
        if solver is not None:
            d0, extra = rate_of(solver)
            extra_fev += extra
            rec.add(0.0, u0, relative_rate(disc.weights, u0, d0, atol))
            tracker = settle.tracker(rtol) if settle is not None else None
            next_snap = 0
            while next_snap < times.size and times[next_snap] <= 0.0:
                snap_t.append(0.0)
                snap_u.append(u0.copy())
                next_snap += 1
        longest = np.inf if solver is None else float(solver.max_step)
        while status is None:
            if settle is not None:
                solver.max_step = min(longest, _longest_step(settle, solver.t))
            msg = solver.step()
            u = solver.y.reshape(system.shape)
            if solver.status == "failed":
                big = not np.all(np.isfinite(u)) or np.max(np.abs(u)) > bound / 1e3
                status = "diverged" if big else "failed"
                message = f"solver failed: {msg}"
                break
            dudt, extra = rate_of(solver)
            extra_fev += extra
            rel = relative_rate(disc.weights, u, dudt, atol)
            size = rec.add(solver.t, u, rel)
            if not size <= bound:  # beyond the bound, or NaN / inf (min and max propagate them)
                rec.drop_last()
                status, message = "diverged", f"|u| exceeded {bound:.3g} (or became non-finite) at t = {solver.t:.6g}"
                break
            if next_snap < times.size and times[next_snap] <= solver.t:
                dense = solver.dense_output()
                while next_snap < times.size and times[next_snap] <= solver.t:
                    snap_t.append(times[next_snap])
                    snap_u.append(dense(times[next_snap]).reshape(system.shape))
                    next_snap += 1
            try:
                for obs in observers:
                    obs.handle(u, solver.t)
            except StopIteration as stop:
                status, message = "reached-end", f"stopped by an observer at t = {solver.t:.6g}: {stop!r}"
                break
            if tracker is not None and tracker.update(solver.t, rel):
                status, message = "settled", f"settled at t = {solver.t:.6g} (relative rate {rel:.3g})"
                break
            if solver.status == "finished":
                status, message = "reached-end", f"reached t_end = {t_end:g} without settling"
    t_final = 0.0 if solver is None else float(solver.t)
    u_final = np.array(u, dtype=float).reshape(system.shape)
    if times.size and t_final < times[-1] and (not snap_t or snap_t[-1] < t_final):
        snap_t.append(t_final)
        snap_u.append(u_final.copy())
    nfev = (0 if solver is None else int(solver.nfev)) + extra_fev
    return RunResult(
        t_final=t_final,
        u=u_final,
        status=status,
        message=message,
        success=status != "failed",
        history=rec.history(),
        snap_t=np.array(snap_t, dtype=float),
        snap_u=np.array(snap_u, dtype=float).reshape((-1,) + system.shape),
        nsteps=max(len(rec.t) - 1, 0),
        nrejected=0 if solver is None else rejected_of(solver),
        nfev=nfev,
        njev=0 if solver is None else int(solver.njev),
        nlu=0 if solver is None else int(solver.nlu),
    )
