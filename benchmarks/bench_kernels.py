"""Time the inner kernels of the stepper beside the general routes they replace, in one process, with ratios.

Run ``python benchmarks/bench_kernels.py`` (a few seconds). Each row is the best of 5 x 50 calls:

- the banded LU of ``W`` (1D, 1000 cells, 2 species) against SuperLU on the same matrix: factorisation,
  and the solve by two ``dtbsv`` calls (no row swaps) against ``dgbtrs`` and against SuperLU's solve;
- the closed-form 2 x 2 node blocks against the batched general inverse (``np.linalg.inv``), 64 x 64 grid;
- ``K u`` by grid slices against the sparse edge-flux product (1D 1000 cells, 2D 64 x 64);
- one species solve of ``M + g K`` on the 12481-node P1 disk: a multigrid V-cycle against SuperLU's solve
  (nested-dissection order, as the ``"split"`` backend used it), and a new ``g`` for multigrid against a
  SuperLU factorisation (fewer repeats: 5 x 5). The V-cycle is not exact: its energy error is about 4 % from
  zero (`tests/solvers/test_multigrid.py`); inside GMRES on ``W`` that is enough.
"""

from __future__ import annotations

import os
import sys
import timeit
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import numpy as np  # noqa: E402
import scipy.sparse as sp  # noqa: E402
import scipy.sparse.linalg as spla  # noqa: E402
from scipy.linalg.lapack import dgbtrs  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bench_solvers import DIFFUSION, jacobian, pulse, reaction  # noqa: E402

from solvers.fem import disk_p1  # noqa: E402
from solvers.grids import interval_fv, rectangle_fv  # noqa: E402
from solvers.multigrid import Multigrid  # noqa: E402
from solvers.stepping import BACKENDS, NodeBlocks, dissection_order  # noqa: E402
from solvers.system import MolSystem  # noqa: E402


def best_us(fun, number: int = 50) -> float:
    """Microseconds per call, best of 5 x ``number``."""
    return min(timeit.repeat(fun, number=number, repeat=5)) / number * 1e6


def row(label: str, ours: float, other: float, other_label: str) -> None:
    """One printed comparison."""
    print(f"  {label:<34}{ours:9.1f} us   {other_label:<26}{other:9.1f} us   ratio {other / ours:5.1f}x")


def banded(gh: float = 0.3) -> None:
    """Banded LU against SuperLU on the same W."""
    disc = interval_fv(10.0, 1000)
    system = MolSystem(disc, DIFFUSION, reaction, jacobian)
    u = pulse(disc)
    band = BACKENDS["banded"](system)
    band.update(u, gh)
    assert band._triangles is not None, "expected a factorisation without row swaps"
    w = (sp.identity(system.n * system.m) - gh * system.mass_jacobian(u)).tocsc()
    r = system.force(u)
    lu = spla.splu(w)
    assert np.allclose(band.solve(r).ravel(), lu.solve(r.ravel()), rtol=1e-10, atol=1e-12)
    print("1D, 1000 cells, 2 species:")
    row("banded factorisation (dgbtrf)", best_us(lambda: band.update(None, gh)), best_us(lambda: spla.splu(w)),
        "SuperLU factorisation")
    b = r.ravel()[band._perm]

    def by_gbtrs():
        return dgbtrs(band._lu, band._half, band._half, b, band._piv)

    ours = best_us(lambda: band.solve(r))
    row("banded solve (2 x dtbsv)", ours, best_us(by_gbtrs), "dgbtrs, no permutation")
    row("banded solve (2 x dtbsv)", ours, best_us(lambda: lu.solve(r.ravel())), "SuperLU solve")


def node_blocks(gh: float = 0.3) -> None:
    """Closed-form 2 x 2 inverses against the batched general inverse."""
    disc = rectangle_fv(10.0, 10.0, 64, 64)
    u = pulse(disc)
    jr = np.moveaxis(jacobian(u), 2, 0)
    blocks = NodeBlocks(jr, np.inf)

    def general():
        return np.linalg.inv(np.eye(2)[None] - gh * jr)

    blocks.rescale(gh)
    z = reaction(u)
    assert np.allclose(blocks.solve(z), np.einsum("mij,jm->im", general(), z), rtol=1e-12)
    print("2D, 64 x 64, 2 species:")
    row("node blocks, closed form", best_us(lambda: blocks.rescale(gh)), best_us(general), "np.linalg.inv batched")


def products() -> None:
    """``K u`` by slices against the sparse edge-flux product."""
    for label, disc in (("1D, 1000 cells", interval_fv(10.0, 1000)), ("2D, 64 x 64", rectangle_fv(10.0, 10.0, 64, 64))):
        system = MolSystem(disc, DIFFUSION, reaction, jacobian)
        u = pulse(disc)
        sliced = best_us(lambda system=system, u=u: system.stiffness_product(u))
        ref = system.stiffness_product(u)
        system._grid = None  # the general route: sparse edge fluxes
        edge = best_us(lambda system=system, u=u: system.stiffness_product(u))
        assert np.allclose(system.stiffness_product(u), ref, rtol=0, atol=1e-12 * np.abs(ref).max())
        print(f"{label}:")
        row("K u by grid slices", sliced, edge, "sparse edge fluxes")


def species_solve(g: float = 0.5) -> None:
    """One V-cycle against a SuperLU solve of ``M + g K`` on the disk, and a new ``g`` against a factorisation."""
    disc = disk_p1(5.0, refine=6)
    mass, stiffness = sp.diags(disc.weights).tocsr(), sp.csr_matrix(disc.stiffness)
    grid = Multigrid(mass, stiffness, disc.prolongations)
    grid.update(g)
    order = dissection_order(disc.coords, stiffness)
    a = sp.csr_matrix(mass + g * stiffness)
    a_nd = a[order][:, order].tocsc()

    def factorise():
        return spla.splu(a_nd, permc_spec="NATURAL", diag_pivot_thresh=0.0, options={"SymmetricMode": True})

    lu = factorise()
    b = mass @ pulse(disc)[0]
    x = grid.solve(b)
    exact = np.empty_like(b)
    exact[order] = lu.solve(b[order])
    error = np.sqrt((x - exact) @ (a @ (x - exact)) / (exact @ (a @ exact)))
    print(f"P1 disk, {disc.m} nodes, one species (V-cycle energy error {error:.1e} on a pulse):")
    row("multigrid V-cycle", best_us(lambda: grid.solve(b)), best_us(lambda: lu.solve(b[order])), "SuperLU solve")
    row("multigrid, new g", best_us(lambda: grid.update(g), 5), best_us(factorise, 5), "SuperLU factorisation")


if __name__ == "__main__":
    banded()
    node_blocks()
    products()
    species_solve()
