"""Conserved totals on P1 meshes (interval, rectangle, disk) and finite volumes, for both time-stepping routes."""

from __future__ import annotations

import numpy as np
import pytest

from solvers.fem import disk_p1, interval_p1, rectangle_p1
from solvers.grids import interval_fv, rectangle_fv
from solvers.stepping import integrate
from solvers.system import MolSystem, grid_conductances

# Wave-pinning kinetics (Mori, Jilkine & Edelstein-Keshet 2008, "Wave-pinning and cell polarity from a
# bistable reaction-diffusion system"): f = b (k0 + a^2 / (1 + a^2)) - a, g = -f, so a + b is conserved.
K0 = 0.067
D_WP = np.array([0.01, 10.0])


def fun_wave_pinning(u):
    """Reaction terms ``(f, -f)``."""
    a, b = u
    f = b * (K0 + a * a / (1 + a * a)) - a
    return np.stack([f, -f])


def jac_wave_pinning(u):
    """Jacobian of `fun_wave_pinning`."""
    a, b = u
    fa = b * 2 * a / (1 + a * a) ** 2 - 1.0
    fb = K0 + a * a / (1 + a * a)
    return np.array([[fa, fb], [-fa, -fb]])


def edge_pulse(disc):
    """A Gaussian pulse of height 1.5 and width 0.5 on ``a`` at one boundary point, compensated in ``b``."""
    corner = np.zeros(disc.dim)
    if disc.shape == "disk":
        corner[0] = disc.size[0]
    r2 = ((disc.coords - corner) ** 2).sum(axis=1)
    bump = 1.5 * np.exp(-r2 / (2 * 0.5**2))
    a = 0.27 + bump
    b = 2.0 - bump
    return np.stack([a, b])


def relative_drift(disc, u0, u):
    """``|total(u) - total(u0)| / total(u0)`` for the total ``weights @ (a + b)``."""
    total0 = disc.weights @ u0.sum(axis=0)
    return abs(disc.weights @ u.sum(axis=0) - total0) / abs(total0)


MESHES = {
    "interval": (lambda: interval_p1(10.0, 400), 500.0),
    "rectangle": (lambda: rectangle_p1(10.0, 6.0, 50, 30), 500.0),
    "disk": (lambda: disk_p1(4.0, refine=5), 500.0),
}


@pytest.mark.slow
@pytest.mark.parametrize("method", ["rdcheck", "scipy-bdf"])
@pytest.mark.parametrize("mesh", sorted(MESHES))
def test_p1_total_to_roundoff(mesh, method):
    """Regression (P1 conservation drift 4e-10): a + b stays fixed to 1e-14 relative over a whole run.

    The requirement is 1e-12 (DESIGN.md: round-off). Measured with the edge-flux ``K u``: at most 7e-16;
    with the former nodal ``K @ u``: 4e-11 (interval), 3e-13 (rectangle, disk), so 1e-14 tells them apart.
    """
    build, t_end = MESHES[mesh]
    disc = build()
    u0 = edge_pulse(disc)
    res = integrate(disc, D_WP, fun_wave_pinning, jac_wave_pinning, u0, t_end, method=method, snapshots=5)
    assert res.status == "reached-end", res.message
    assert res.u[0].max() > 2 * res.u[0].min()  # a pattern formed: the fluxes did not vanish
    drifts = [relative_drift(disc, u0, s) for s in res.snap_u]
    assert max(drifts) < 1e-14, f"relative drifts {drifts}"


def test_edge_product_equals_stiffness(rng):
    """The edge-flux product equals ``K @ u`` to round-off on a disk, and its column sums vanish (fv and p1)."""
    for disc in (disk_p1(1.0, refine=3), interval_fv(2.0, 30)):
        system = MolSystem(disc, D_WP, fun_wave_pinning, jac_wave_pinning)
        u = 1.0 + rng.random((2, disc.m))
        direct = (system.stiffness @ u.T).T
        edge = system.stiffness_product(u)
        np.testing.assert_allclose(edge, direct, atol=1e-12 * np.abs(system.stiffness).max())
        ones = system.stiffness_product(np.ones((2, disc.m)))
        np.testing.assert_array_equal(ones, 0.0)


def test_grid_product_is_the_edge_product(rng):
    """On uniform grids the slice-wise flux product is taken and equals the sparse edge product; a total of the
    product of any state vanishes to the rounding of the fluxes (1D and 2D finite volumes)."""
    for disc in (interval_fv(3.0, 40), rectangle_fv(4.0, 3.0, 12, 7)):
        system = MolSystem(disc, D_WP, fun_wave_pinning, jac_wave_pinning)
        assert system._grid is not None
        u = 1.0 + rng.random((2, disc.m))
        sliced = system.stiffness_product(u)
        system._grid = None
        edge = system.stiffness_product(u)
        np.testing.assert_allclose(sliced, edge, rtol=0, atol=1e-13 * np.abs(system.stiffness).max())
        assert np.abs(sliced.sum(axis=1)).max() < 1e-13 * np.abs(system.stiffness).max()


def test_grid_conductances_refuse_other_operators():
    """No slice-wise product for a P1 mesh, a grid whose faces differ, or a wrong grid shape."""
    disc = rectangle_fv(4.0, 3.0, 12, 7)
    assert grid_conductances(disc.stiffness, (7, 12)) is None
    assert grid_conductances(disc.stiffness, (84,)) is None
    assert grid_conductances(interval_p1(1.0, 10).stiffness, None) is None
    bent = disc.stiffness.tolil()
    bent[3, 4] = bent[4, 3] = bent[3, 4] * 1.5  # one face of another conductance
    assert grid_conductances(bent.tocsr(), disc.grid) is None


@pytest.mark.parametrize(("species", "options", "lumped"), [
    ("multigrid", {}, True), ("multigrid", {}, False), ("multigrid", {"krylov": 0, "theta": 1.0}, True),
    ("superlu", {}, True), ("superlu", {"krylov": 0, "theta": 1.0}, True)])
def test_split_backend_matches_lu_on_disk(species, options, lumped):
    """The per-species ("split") backend, its species solved by multigrid or by SuperLU, and the coupled sparse
    LU agree on a P1 disk at tight tolerance (lumped or consistent mass); totals kept to round-off."""
    options = {**options, "species": species}
    disc = disk_p1(3.0, refine=3, lumped=lumped)
    u0 = edge_pulse(disc)
    runs = [integrate(disc, D_WP, fun_wave_pinning, jac_wave_pinning, u0, 50.0, rtol=1e-7, atol=1e-10,
                      backend=b, backend_options=o) for b, o in (("lu", {}), ("split", options))]
    diff = np.linalg.norm(runs[0].u - runs[1].u) / np.linalg.norm(runs[0].u)
    assert diff < 1e-5, f"relative difference {diff:.3g}"
    assert runs[1].u[0].max() > 2 * runs[1].u[0].min()
    assert relative_drift(disc, u0, runs[1].u) < 1e-14
