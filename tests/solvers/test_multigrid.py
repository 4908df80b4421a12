"""Geometric multigrid on the refined disk: transfer, contraction, totals, linearity, argument checks."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from solvers.fem import disk_p1, interval_p1, rectangle_p1
from solvers.multigrid import Multigrid


def energy_errors(disc, g: float, rng, cycles: int = 4) -> list[float]:
    """Relative energy-norm errors of ``x <- x + cycle(b - A x)`` from zero, for a random exact solution."""
    mass, stiffness = sp.csr_matrix(disc.mass), sp.csr_matrix(disc.stiffness)
    grid = Multigrid(mass, stiffness, disc.prolongations)
    grid.update(g)
    a = mass + g * stiffness
    exact = rng.standard_normal(disc.m)
    b = a @ exact
    x, out = np.zeros(disc.m), []
    for _ in range(cycles):
        x = x + grid.solve(b - a @ x)
        e = x - exact
        out.append(float(np.sqrt(e @ (a @ e) / (exact @ (a @ exact)))))
    return out


def test_disk_hierarchy_interpolates_constants_and_linear_functions():
    """Each interpolation keeps constants everywhere and linear functions at interior nodes (P1 midpoints).

    Only the new boundary nodes, moved onto the circle after the midpoint rule, differ from a linear function.
    """
    radius, level = 2.0, 4
    meshes = [disk_p1(radius, refine=k) for k in range(level + 1)]
    fine = meshes[-1]
    assert len(fine.prolongations) == level
    for coarse, finer, p in zip(meshes[:-1], meshes[1:], fine.prolongations, strict=True):
        assert p.shape == (finer.m, coarse.m)
        np.testing.assert_allclose(p @ np.ones(coarse.m), 1.0, rtol=0, atol=1e-15)
        linear = coarse.coords @ [0.7, -1.3] + 0.2
        on_circle = np.isclose(np.linalg.norm(finer.coords, axis=1), radius)
        moved = np.zeros(finer.m, dtype=bool)
        moved[coarse.m :] = on_circle[coarse.m :]
        np.testing.assert_allclose((p @ linear)[~moved], (finer.coords @ [0.7, -1.3] + 0.2)[~moved], atol=1e-12)
    assert interval_p1(1.0, 20).prolongations == ()


def test_rectangle_hierarchy_is_exact_and_only_where_it_helps():
    """P1 rectangles: counts halve down to at most 600 nodes and interpolation is exact on linear functions
    (nested meshes); odd counts, or cells stretched beyond 1.5 : 1, get no hierarchy."""
    disc = rectangle_p1(10.0, 6.0, 128, 64)
    assert [p.shape for p in disc.prolongations] == [(2145, 561), (8385, 2145)]
    coarse = rectangle_p1(10.0, 6.0, 32, 16)
    p = disc.prolongations[0]
    np.testing.assert_allclose(p @ (coarse.coords @ [0.4, 1.1] - 0.3),
                               rectangle_p1(10.0, 6.0, 64, 32).coords @ [0.4, 1.1] - 0.3, atol=1e-12)
    assert rectangle_p1(10.0, 6.0, 63, 64).prolongations == ()
    assert rectangle_p1(10.0, 1.0, 64, 64).prolongations == ()


@pytest.mark.parametrize("g", [0.0, 1.0, 1e3])
def test_vcycle_contracts_on_rectangles(g, rng):
    """On P1 rectangles of cells up to 1.5 : 1 the first cycle leaves under 6 % of the energy error and each
    later one cuts it 4x or more (measured: 4 % and at most 0.22)."""
    for dims in ((10.0, 10.0, 64, 64), (10.0, 6.67, 64, 64), (10.0, 6.0, 128, 64)):
        errs = energy_errors(rectangle_p1(*dims), g, rng, cycles=6)
        rates = [b / a for a, b in zip(errs, errs[1:], strict=False)]
        assert errs[0] < 0.06 and max(rates) < 0.25, f"{dims}: errors {errs}"


@pytest.mark.parametrize("lumped", [True, False], ids=["lumped", "consistent"])
@pytest.mark.parametrize("g", [0.0, 1e-3, 1.0, 1e3])
def test_vcycle_contracts_independently_of_mesh_and_g(lumped, g, rng):
    """The first V-cycle leaves under 6 % of the energy error and each later one cuts it 5x or more, the same on
    every mesh size and for every ``g`` (measured: 4 % and at most 0.13 per cycle, levels 4 to 6).

    Mesh-independent contraction is the defining property of multigrid (Briggs, Henson & McCormick 2000,
    A Multigrid Tutorial, ch. 5, from memory).
    """
    last = {}
    for level in (4, 5, 6):
        errs = energy_errors(disk_p1(3.0, refine=level, lumped=lumped), g, rng, cycles=6)
        rates = [b / a for a, b in zip(errs, errs[1:], strict=False)]
        assert errs[0] < 0.06 and max(rates) < 0.2, f"level {level}: errors {errs}"
        last[level] = rates[-1]
    assert last[6] < 1.5 * last[5] + 0.01, f"contraction per level {last}"  # no growth with refinement


def test_vcycle_converges_to_the_direct_solve(rng):
    """Iterated cycles reach SuperLU's solution to 1e-12 relative (same system, two routes)."""
    disc = disk_p1(1.5, refine=5)
    mass, stiffness = sp.csr_matrix(disc.mass), sp.csr_matrix(disc.stiffness)
    grid = Multigrid(mass, stiffness, disc.prolongations)
    grid.update(0.3)
    a = sp.csc_matrix(mass + 0.3 * stiffness)
    b = rng.standard_normal(disc.m)
    direct = spla.splu(a).solve(b)
    x = np.zeros(disc.m)
    for _ in range(12):
        x = x + grid.solve(b - a @ x)
    assert np.linalg.norm(x - direct) < 1e-12 * np.linalg.norm(direct)


@pytest.mark.parametrize("lumped", [True, False], ids=["lumped", "consistent"])
def test_cycle_keeps_the_total_and_is_linear(lumped, rng):
    """``1^T A x = 1^T b`` to round-off (what conservation needs), and the cycle is a linear map of ``b``."""
    disc = disk_p1(1.0, refine=4, lumped=lumped)
    mass, stiffness = sp.csr_matrix(disc.mass), sp.csr_matrix(disc.stiffness)
    grid = Multigrid(mass, stiffness, disc.prolongations)
    for g in (1e-2, 10.0):
        grid.update(g)
        a = mass + g * stiffness
        b1, b2 = rng.standard_normal(disc.m), 3.0 + rng.standard_normal(disc.m)
        x1, x2 = grid.solve(b1), grid.solve(b2)
        assert abs((a @ x2).sum() - b2.sum()) < 1e-13 * (abs(a) @ np.abs(x2)).sum()
        np.testing.assert_allclose(grid.solve(2.0 * b1 - b2), 2.0 * x1 - x2, rtol=0, atol=1e-12 * np.abs(x2).max())


def test_levels_stop_at_the_coarse_size_and_one_level_is_exact(rng):
    """Levels run down to the first with at most ``coarse_nodes`` nodes; with no hierarchy the solve is exact."""
    disc = disk_p1(1.0, refine=6)
    assert Multigrid(disc.mass, disc.stiffness, disc.prolongations).sizes == [217, 817, 3169, 12481]
    assert Multigrid(disc.mass, disc.stiffness, disc.prolongations, coarse_nodes=1000).sizes == [817, 3169, 12481]
    small = disk_p1(1.0, refine=2)
    grid = Multigrid(small.mass, small.stiffness)
    grid.update(2.0)
    b = rng.standard_normal(small.m)
    a = (small.mass + 2.0 * small.stiffness).toarray()
    np.testing.assert_allclose(a @ grid.solve(b), b, atol=1e-12)


def test_arguments_are_checked():
    """A smoother of degree 0 and an interpolation onto the wrong node count raise, naming the argument."""
    disc = disk_p1(1.0, refine=3)
    with pytest.raises(ValueError, match="`degree`"):
        Multigrid(disc.mass, disc.stiffness, disc.prolongations, degree=0)
    with pytest.raises(ValueError, match="`prolongations`"):
        Multigrid(disc.mass, disc.stiffness, disc.prolongations[:-1], coarse_nodes=1)
