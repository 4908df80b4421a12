"""Time our stepper against scipy's solve_ivp(BDF) on a mass-conserved polarity problem, side by side.

Run ``python benchmarks/bench_solvers.py`` (about 6 minutes) or ``--quick`` (about 20 s). For every
case and method it climbs a ladder of tolerances (loosest first) until the final state is within
``--target`` (relative L2) of a fine reference (ours at rtol 1e-7), and prints for that run: wall time,
accepted steps, peak memory (tracemalloc of Python/numpy allocations, in a second run; SuperLU's own
buffers are not seen by it, so the process's peak RSS is printed at the end too), the error, and the
speed-up of ours. It also prints the lower bound of the issue: the accepted steps a second-order method
needs at that accuracy (ours with the 2-stage ROS2 tableau, climbing the same ladder) x (one diffusion
solve + one reaction evaluation), with the cheapest exact diffusion solve there is for the mesh (see
`diffusion_solvers`): what an ideal semi-implicit second-order scheme would pay, with no overhead at all.

The methods:

- ``fd+sparsity``: the usual hand-written script, finite differences written out with numpy and
  ``solve_ivp(method="BDF", jac_sparsity=...)``, which estimates the Jacobian by grouped differences.
- ``bdf+jac``: ``solve_ivp(method="BDF")`` on our `MolSystem` with its analytic sparse Jacobian.
- ``rdcheck``: `solvers.stepping.integrate` (ROS34PW2; cosine transforms on 2D grids, per-species
  factorisations with GMRES on P1 disks, banded LU in 1D; see `choose_backend`).
- ``rdcheck/superlu`` (P1 meshes only): ours with the species solves of the ``"split"`` backend by SuperLU
  factorisations instead of the default multigrid V-cycle, to show what multigrid buys.
- ``ros2`` (for the bound only): the same stepper with the 2-stage, second-order ROS2 tableau.

Short runs are timed as the best of up to 5 repeats (while they take under 0.5 s in all), every method alike.

The model is ``f = c (k0 + gamma a^2 / (1 + a^2)) - delta a``, ``g = -f`` (membrane ``a``, cytosol ``c``)
with parameter values invented for this benchmark (k0 = 0.067, gamma = 1, delta = 1, D_a = 0.05,
D_c = 1, length 10 or radius 5): they only need to make a pattern grow from a pulse at the boundary.
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import time
import timeit
import tracemalloc
from dataclasses import dataclass
from pathlib import Path

# One BLAS thread for every method, unless the caller says otherwise: on this shared 2-core machine threaded
# OpenBLAS took 16 ms for one dot product of 25000 numbers (9 us single-threaded), measured.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402
import scipy.sparse as sp  # noqa: E402
import scipy.sparse.linalg as spla  # noqa: E402
from scipy.fft import dctn, idctn  # noqa: E402
from scipy.integrate import solve_ivp  # noqa: E402
from scipy.linalg.lapack import dpttrf, dpttrs  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from solvers.fem import disk_p1, rectangle_p1  # noqa: E402
from solvers.grids import interval_fv, rectangle_fv  # noqa: E402
from solvers.stepping import (  # noqa: E402
    TABLEAUS,
    cosine_applies,
    cosine_eigenvalues,
    dissection_order,
    integrate,
    line_order,
)
from solvers.system import MolSystem  # noqa: E402

K0, GAMMA, DELTA = 0.067, 1.0, 1.0
DIFFUSION = np.array([0.05, 1.0])
LADDER = (1e-1, 5e-2, 2e-2, 1e-2, 5e-3, 2e-3, 1e-3, 5e-4, 2e-4, 1e-4, 5e-5, 2e-5, 1e-5)


def reaction(u: np.ndarray) -> np.ndarray:
    """Polarity kinetics, ``(2, m)``."""
    a, c = u
    f = c * (K0 + GAMMA * a * a / (1 + a * a)) - DELTA * a
    return np.stack([f, -f])


def jacobian(u: np.ndarray) -> np.ndarray:
    """Jacobian of `reaction`, ``(2, 2, m)``."""
    a, c = u
    fa = c * GAMMA * 2 * a / (1 + a * a) ** 2 - DELTA
    fc = K0 + GAMMA * a * a / (1 + a * a)
    return np.array([[fa, fc], [-fa, -fc]])


def pulse(disc) -> np.ndarray:
    """A membrane pulse at one end (or edge point) over a uniform cytosol."""
    corner = np.zeros(disc.dim)
    if disc.shape == "disk":
        corner[0] = disc.size[0]
    r2 = ((disc.coords - corner) ** 2).sum(axis=1)
    return np.stack([0.2 + 2.0 * np.exp(-r2 / 0.5), np.full(disc.m, 2.0)])


# ---- (i) the hand-written script ------------------------------------------------------------------------


def fd_script(grid: tuple[int, ...], length: float, y0: np.ndarray, t_end: float, rtol: float):
    """Finite differences by hand with no-flux ghost cells, then solve_ivp BDF with jac_sparsity."""
    dx = length / grid[0]
    da, dc = DIFFUSION

    def lap(v):
        v = v.reshape(grid)
        p = np.pad(v, 1, mode="edge")
        if len(grid) == 1:
            out = p[2:] - 2 * v + p[:-2]
        else:
            out = p[2:, 1:-1] + p[:-2, 1:-1] + p[1:-1, 2:] + p[1:-1, :-2] - 4 * v
        return out.ravel() / dx**2

    m = int(np.prod(grid))

    def fun(t, y):
        a, c = y[:m], y[m:]
        f = c * (K0 + GAMMA * a * a / (1 + a * a)) - DELTA * a
        return np.concatenate([da * lap(a) + f, dc * lap(c) - f])

    eye = [sp.identity(n) for n in grid]
    if len(grid) == 1:
        one = sp.diags([1.0, 1.0, 1.0], [-1, 0, 1], shape=(m, m))
    else:
        one = sp.kron(sp.diags([1.0, 1.0, 1.0], [-1, 0, 1], shape=(grid[0],) * 2), eye[1]) + sp.kron(
            eye[0], sp.diags([1.0, 1.0, 1.0], [-1, 0, 1], shape=(grid[1],) * 2)
        )
    sparsity = sp.kron(sp.identity(2), one) + sp.kron(np.ones((2, 2)), sp.identity(m))
    sol = solve_ivp(fun, (0.0, t_end), y0, method="BDF", rtol=rtol, atol=1e-9, jac_sparsity=sparsity)
    return sol.y[:, -1], sol.nfev, len(sol.t) - 1


# ---- runs -----------------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class Run:
    """One timed run."""

    method: str
    rtol: float
    seconds: float
    steps: int
    error: float
    peak_mb: float = float("nan")


def run_method(method: str, disc, u0: np.ndarray, t_end: float, rtol: float):
    """Final state and accepted steps of one method at one tolerance."""
    if method == "fd+sparsity":
        y, _, steps = fd_script(disc.grid, disc.size[0], u0.ravel(), t_end, rtol)
        return y.reshape(u0.shape), steps
    if method == "bdf+jac":
        system = MolSystem(disc, DIFFUSION, reaction, jacobian)
        sol = solve_ivp(system.rhs, (0.0, t_end), u0.ravel(), method="BDF", rtol=rtol, atol=1e-9,
                        jac=system.jac)
        return sol.y[:, -1].reshape(u0.shape), len(sol.t) - 1
    scheme = "ros2" if method == "ros2" else "ros34pw2"
    options = {"backend": "split", "backend_options": {"species": "superlu"}} if method == "rdcheck/superlu" else {}
    res = integrate(disc, DIFFUSION, reaction, jacobian, u0, t_end, rtol=rtol, atol=1e-9, scheme=scheme, **options)
    return res.u, res.nsteps


def timed(method, disc, u0, t_end, rtol, ref) -> Run:
    """Wall time (best of up to 5 repeats while they take under 0.5 s in all, for every method alike) and error."""
    best, spent, repeats = np.inf, 0.0, 0
    while repeats < 5 and (repeats == 0 or spent + best < 0.5):
        start = time.perf_counter()
        u, steps = run_method(method, disc, u0, t_end, rtol)
        seconds = time.perf_counter() - start
        best, spent, repeats = min(best, seconds), spent + seconds, repeats + 1
    return Run(method, rtol, best, steps, float(np.linalg.norm(u - ref) / np.linalg.norm(ref)))


def peak_memory(method, disc, u0, t_end, rtol) -> float:
    """Peak traced allocation (MB) of one run."""
    tracemalloc.start()
    run_method(method, disc, u0, t_end, rtol)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return peak / 2**20


def climb(method, disc, u0, t_end, ref, target, memory) -> Run:
    """The loosest tolerance of the ladder whose final-state error is within ``target``."""
    run = None
    for rtol in LADDER:
        run = timed(method, disc, u0, t_end, rtol, ref)
        if run.error <= target:
            break
    if memory:
        run = Run(run.method, run.rtol, run.seconds, run.steps, run.error,
                  peak_memory(method, disc, u0, t_end, run.rtol))
    return run


def diffusion_solvers(disc, gh: float) -> dict:
    """Exact solves of ``(M + gh D_i K) x_i = M r_i`` for every species, factorised once, by every route that applies.

    Cosine transforms on uniform grids, LAPACK's symmetric tridiagonal ``dpttrs`` on 1D chains with lumped
    mass, SuperLU per species (its own ordering, and our nested dissection) on anything: one diffusion solve
    of a semi-implicit (IMEX) second-order scheme.
    """
    out = {}
    if cosine_applies(disc):
        axes = tuple(range(1, 1 + disc.dim))
        diag = 1.0 / (1.0 + gh * DIFFUSION.reshape((-1,) + (1,) * disc.dim) * cosine_eigenvalues(disc)[None])

        def by_cosines(r):
            x = r.reshape((-1,) + tuple(disc.grid))
            return idctn(diag * dctn(x, type=2, norm="ortho", axes=axes), type=2, norm="ortho", axes=axes)

        out["cosine transforms"] = by_cosines
    mass = sp.diags(disc.weights) if disc.lumped else sp.csr_matrix(disc.mass)
    mats = [sp.csr_matrix(mass + gh * d * disc.stiffness) for d in DIFFUSION]
    order = line_order(disc)
    if order is not None and disc.lumped:
        factors = [dpttrf(m.diagonal()[order], m[order][:, order].diagonal(1))[:2] for m in mats]
        w = disc.weights[order]

        def by_tridiagonal(r):
            x = np.empty_like(r)
            for i, (dd, ee) in enumerate(factors):
                x[i, order] = dpttrs(dd, ee, r[i, order] * w)[0]
            return x

        out["tridiagonal dpttrs"] = by_tridiagonal
    lus = [spla.splu(sp.csc_matrix(m)) for m in mats]

    def by_superlu(r):
        return np.stack([lu.solve(mass @ r[i]) for i, lu in enumerate(lus)])

    out["SuperLU per species"] = by_superlu
    nd = dissection_order(disc.coords, sp.csr_matrix(disc.stiffness))
    nd_lus = [spla.splu(sp.csc_matrix(m[nd][:, nd]), permc_spec="NATURAL", diag_pivot_thresh=0.0,
                        options={"SymmetricMode": True}) for m in mats]

    def by_dissection(r):
        x = np.empty_like(r)
        for i, lu in enumerate(nd_lus):
            x[i, nd] = lu.solve(np.ascontiguousarray((mass @ r[i])[nd]))
        return x

    out["SuperLU per species, nested dissection"] = by_dissection
    return out


@dataclass(frozen=True)
class Bound:
    """The lower bound for ours: ``steps x (one diffusion solve + one reaction evaluation)``."""

    steps: int
    solver: str
    solve_us: float
    reaction_us: float

    @property
    def seconds(self) -> float:
        """The bound itself."""
        return self.steps * (self.solve_us + self.reaction_us) * 1e-6


def best_of(fun) -> float:
    """Microseconds per call, best of 5 x 20."""
    return min(timeit.repeat(fun, number=20, repeat=5)) / 20 * 1e6


def lower_bound(disc, u0, steps: int) -> Bound:
    """Time the cheapest diffusion solve (each route checked on its residual) and one reaction evaluation."""
    gh = 0.1
    r = reaction(u0)
    mass = sp.diags(disc.weights) if disc.lumped else sp.csr_matrix(disc.mass)
    times = {}
    for name, solve in diffusion_solvers(disc, gh).items():
        x = np.asarray(solve(r)).reshape(r.shape)
        for i, d in enumerate(DIFFUSION):  # a timed solve must solve the right system
            resid = (mass + gh * d * disc.stiffness) @ x[i] - mass @ r[i]
            assert np.linalg.norm(resid) <= 1e-10 * np.linalg.norm(mass @ r[i]), f"{name}: wrong solve"
        times[name] = best_of(lambda solve=solve: solve(r))
    fastest = min(times, key=times.get)
    return Bound(steps, fastest, times[fastest], best_of(lambda: reaction(u0)))


def cases(quick: bool, sizes_1d, sizes_2d, disk_level: int | None, rect_p1: int = 0):
    """(label, discretisation, methods) to run."""
    out = []
    for cells in sizes_1d:
        out.append((f"1D FV {cells}", interval_fv(10.0, cells), ("fd+sparsity", "bdf+jac", "rdcheck")))
    for n in sizes_2d:
        out.append((f"2D FV {n}x{n}", rectangle_fv(10.0, 10.0, n, n), ("fd+sparsity", "bdf+jac", "rdcheck")))
    if rect_p1:
        disc = rectangle_p1(10.0, 10.0, rect_p1, rect_p1)
        out.append((f"2D P1 {rect_p1}x{rect_p1}", disc, ("bdf+jac", "rdcheck/superlu", "rdcheck")))
    if disk_level is not None:
        disc = disk_p1(5.0, refine=disk_level)
        out.append((f"disk P1 {disc.m} nodes", disc, ("bdf+jac", "rdcheck/superlu", "rdcheck")))
    return out


def main(argv: list[str] | None = None) -> None:
    """Parse flags, run every case, print the table."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="1D 1000 and 2D 64x64 only")
    parser.add_argument("--sizes-1d", type=int, nargs="*", default=[400, 1000, 2000])
    parser.add_argument("--sizes-2d", type=int, nargs="*", default=[64, 128])
    parser.add_argument("--disk-level", type=int, default=6, help="disk refinement (6: 12481 nodes); -1 skips")
    parser.add_argument("--rect-p1", type=int, default=64, help="cells per side of a P1 square; 0 skips")
    parser.add_argument("--big", type=int, default=256, help="n of an n x n run of ours for memory; 0 skips")
    parser.add_argument("--t-end", type=float, default=200.0)
    parser.add_argument("--target", type=float, default=1e-3, help="final-state relative L2 error to reach")
    parser.add_argument("--no-memory", action="store_true", help="skip the tracemalloc reruns")
    args = parser.parse_args(argv)
    if args.quick:
        args.sizes_1d, args.sizes_2d, args.disk_level, args.big, args.rect_p1 = [1000], [64], -1, 0, 0
    disk = None if args.disk_level < 0 else args.disk_level
    print(f"scheme {sorted(TABLEAUS)}; t_end {args.t_end}; target error {args.target:g}; ladder {LADDER}")
    header = (f"{'case':<22}{'method':<16}{'rtol':>7}{'seconds':>9}{'steps':>7}{'error':>10}{'peak MB':>9}"
              f"{'t / ours':>10}")
    for label, disc, methods in cases(args.quick, args.sizes_1d, args.sizes_2d, disk, args.rect_p1):
        u0 = pulse(disc)
        start = time.perf_counter()
        ref = integrate(disc, DIFFUSION, reaction, jacobian, u0, args.t_end, rtol=1e-7, atol=1e-11).u
        ref_s = time.perf_counter() - start
        print(f"\n{label}: reference (ours, rtol 1e-7) {ref_s:.2f} s; pattern max/min a = "
              f"{ref[0].max():.3f}/{ref[0].min():.3f}")
        print(header)
        runs = {m: climb(m, disc, u0, args.t_end, ref, args.target, not args.no_memory) for m in methods}
        ours = runs["rdcheck"]
        second = climb("ros2", disc, u0, args.t_end, ref, args.target, False)
        for run in runs.values():
            ratio = run.seconds / ours.seconds
            flag = "" if run.error <= args.target else "  (target not reached)"
            print(f"{'':<22}{run.method:<16}{run.rtol:>7.0e}{run.seconds:>9.3f}{run.steps:>7d}{run.error:>10.2e}"
                  f"{run.peak_mb:>9.1f}{ratio:>9.1f}x{flag}")
        bound = lower_bound(disc, u0, second.steps)
        print(f"{'':<22}second order (ours with ROS2): {second.steps} steps at rtol {second.rtol:.0e}, "
              f"error {second.error:.2e}")
        print(f"{'':<22}lower bound: {bound.steps} steps x (diffusion solve {bound.solve_us:.0f} us, "
              f"{bound.solver}, + reaction {bound.reaction_us:.0f} us) = {bound.seconds:.4f} s; "
              f"ours / bound = {ours.seconds / bound.seconds:.1f}")
    if args.big:
        disc = rectangle_fv(10.0, 10.0, args.big, args.big)
        u0 = pulse(disc)
        tracemalloc.start()
        start = time.perf_counter()
        res = integrate(disc, DIFFUSION, reaction, jacobian, u0, args.t_end, rtol=1e-3, atol=1e-9)
        seconds = time.perf_counter() - start
        peak = tracemalloc.get_traced_memory()[1] / 2**20
        tracemalloc.stop()
        print(f"\n2D FV {args.big}x{args.big}, ours at rtol 1e-3: {seconds:.2f} s (under tracemalloc), "
              f"{res.nsteps} steps, status {res.status}, peak traced {peak:.0f} MB")
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"\nprocess peak RSS {rss:.0f} MB (all runs, imports included)")


if __name__ == "__main__":
    main()
