"""P1 elements through scikit-fem: Neumann spectra, measures, conservation, the registry."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg as sla
from scipy.sparse.linalg import eigsh
from scipy.special import jnp_zeros

from solvers.fem import (
    DISCRETISATIONS,
    disk_level,
    disk_node_count,
    disk_p1,
    interval_p1,
    make_discretisation,
    rectangle_p1,
)

# First zero of J_1', Abramowitz & Stegun 1964, Handbook of Mathematical Functions, table 9.5.
J1_PRIME_1 = 1.8411837813


def smallest_eigenvalues(disc, k: int) -> np.ndarray:
    """The ``k`` smallest eigenvalues of ``K v = lambda M v`` (dense for small meshes, shift-invert else)."""
    if disc.m <= 600:
        lam = sla.eigh(disc.stiffness.toarray(), disc.mass.toarray(), eigvals_only=True)
    else:
        lam = eigsh(disc.stiffness.tocsc(), k=k, M=disc.mass.tocsc(), sigma=-1.0, which="LM")[0]
    return np.sort(lam)[:k]


def observed_order(h: np.ndarray, err: np.ndarray) -> float:
    """Slope of the least-squares fit of ``log err`` against ``log h``."""
    return float(np.polyfit(np.log(h), np.log(err), 1)[0])


@pytest.mark.parametrize("lumped", [True, False], ids=["lumped", "consistent"])
def test_interval_neumann_eigenvalues_second_order(lumped):
    """Neumann eigenvalues on [0, L] converge to ``(n pi / L)^2`` at order 2 (common practice)."""
    length = 3.0
    cells = np.array([8, 16, 32, 64, 128])
    modes = np.arange(1, 4)
    exact = (modes * np.pi / length) ** 2
    err = np.array(
        [np.abs(smallest_eigenvalues(interval_p1(length, n, lumped=lumped), 4)[1:] - exact) for n in cells]
    )
    for j, n in enumerate(modes):
        rate = observed_order(length / cells, err[:, j])
        assert abs(rate - 2.0) < 0.1, f"mode {n}: observed order {rate:.3f}, expected 2"
    # lumped mass lowers the eigenvalues, consistent mass raises them (min-max; common practice)
    lam = smallest_eigenvalues(interval_p1(length, 16, lumped=lumped), 4)[1:]
    assert np.all(lam < exact) if lumped else np.all(lam > exact)


def test_rectangle_neumann_eigenvalues_second_order():
    """Rectangle Neumann eigenvalues approach ``pi^2 (n^2/Lx^2 + m^2/Ly^2)`` at order 2 (common practice)."""
    lx, ly = 2.0, 1.0
    exact = np.sort([np.pi**2 * (n**2 / lx**2 + k**2 / ly**2) for n in range(4) for k in range(3)])[1:4]
    res = np.array([4, 8, 16, 32])
    err = np.array(
        [np.abs(smallest_eigenvalues(rectangle_p1(lx, ly, 2 * n, n), 4)[1:] - exact).max() for n in res]
    )
    rate = observed_order(ly / res, err)
    assert abs(rate - 2.0) < 0.15, f"observed order {rate:.3f}, expected 2"


def test_disk_first_neumann_eigenvalue_converges():
    """Disk: the first nonzero Neumann eigenvalue, a double one, tends to ``(j'_11 / R)^2`` at order 2.

    ``j'_11 = 1.8411837813``: Abramowitz & Stegun 1964, table 9.5 (checked against scipy's ``jnp_zeros``).
    """
    assert abs(jnp_zeros(1, 1)[0] - J1_PRIME_1) < 1e-9
    radius = 2.0
    exact = (J1_PRIME_1 / radius) ** 2
    levels = np.array([3, 4, 5, 6])
    lams = np.array([smallest_eigenvalues(disk_p1(radius, refine=int(lev)), 3) for lev in levels])
    np.testing.assert_allclose(lams[:, 0], 0.0, atol=1e-8)
    np.testing.assert_allclose(lams[:, 1], lams[:, 2], rtol=1e-8)  # the cos and sin modes
    err = np.abs(lams[:, 1] - exact)
    rate = observed_order(radius / 2.0**levels, err)
    assert abs(rate - 2.0) < 0.1, f"observed order {rate:.3f}, expected 2"
    assert err[-1] < 3e-5 * exact


def test_disk_area_converges_from_below():
    """Disk weights sum to the inscribed polygon's area, below ``pi R^2`` by ``O(h^2)``."""
    radius = 1.5
    levels = np.arange(2, 7)
    gap = np.array([np.pi * radius**2 - disk_p1(radius, refine=int(lev)).weights.sum() for lev in levels])
    assert np.all(gap > 0)
    rate = observed_order(2.0**-levels, gap)
    assert abs(rate - 2.0) < 0.05, f"observed order {rate:.3f}, expected 2"


@pytest.mark.parametrize("lumped", [True, False], ids=["lumped", "consistent"])
@pytest.mark.parametrize(
    "build",
    [
        lambda lu: interval_p1(2.5, 31, lu),
        lambda lu: rectangle_p1(2.0, 0.7, 9, 5, lu),
        lambda lu: disk_p1(3.0, 3, None, lu),
    ],
    ids=["interval", "rectangle", "disk"],
)
def test_p1_operators(build, lumped):
    """``K @ 1 == 0`` exactly, ``K`` and ``M`` symmetric, ``K`` PSD, mass row sums equal the weights."""
    disc = build(lumped)
    one = np.ones(disc.m)
    k, m = disc.stiffness, disc.mass
    assert np.all(k @ one == 0.0) and np.all(one @ k == 0.0)
    assert abs(k - k.T).max() == 0.0 and abs(m - m.T).max() < 1e-15 * disc.weights.max()
    assert np.linalg.eigvalsh(k.toarray()).min() > -1e-12 * abs(k).max()
    np.testing.assert_allclose(np.asarray(m.sum(axis=1)).ravel(), disc.weights, rtol=1e-13)
    assert disc.lumped == lumped and disc.method == "p1" and disc.grid is None
    if disc.shape != "disk":
        assert disc.weights.sum() == pytest.approx(np.prod(disc.size), rel=1e-13)


def test_disk_node_counts_and_target():
    """Node counts follow ``1 + 3 * 2^l (2^l + 1)``; a 10k-16k target picks the 12481-node level."""
    assert [disk_node_count(lev) for lev in range(7)] == [7, 19, 61, 217, 817, 3169, 12481]
    assert disk_p1(1.0, refine=4).m == disk_node_count(4)
    assert disk_level(10_000) == disk_level(16_000) == 6
    assert disk_p1(1.0, nodes=800).m == 817
    radii = np.linalg.norm(disk_p1(2.0, refine=3).coords, axis=1)
    assert radii.max() == pytest.approx(2.0, rel=1e-14)


@pytest.mark.parametrize("key", sorted(DISCRETISATIONS), ids=lambda k: "/".join(k))
def test_registry_builds_each_pair(key):
    """Every registered (shape, method) builds a discretisation of that shape and method."""
    shape, method = key
    size = {"interval": 4.0, "rectangle": (2.0, 1.0), "disk": 1.0}[shape]
    disc = make_discretisation(shape, size, 16, method=method)
    assert (disc.shape, disc.method) == key
    assert disc.weights.sum() == pytest.approx(np.pi if shape == "disk" else np.prod(disc.size), rel=1e-2)


def test_registry_resolution_conventions():
    """Rectangle: cells along the longer side, the other in proportion, or explicit; disk: per radius."""
    assert make_discretisation("rectangle", (2.0, 1.0), 64).grid == (64, 32)
    assert make_discretisation("rectangle", (1.0, 3.0), 30).grid == (10, 30)
    assert make_discretisation("rectangle", (1.0, 3.0), (5, 7)).grid == (5, 7)
    assert make_discretisation("disk", 1.0, 64, method="p1").m == 12481
    assert make_discretisation("interval", (5.0,), 40, method="p1").m == 41


def test_registry_errors():
    """Unknown keys list the valid ones; a finite-volume disk and unlumped finite volumes are refused."""
    with pytest.raises(ValueError, match="valid: .*interval/fv"):
        make_discretisation("annulus", 1.0, 8)
    with pytest.raises(ValueError, match="disk needs method 'p1'"):
        make_discretisation("disk", 1.0, 8, method="fv")
    with pytest.raises(ValueError, match="`lumped=False`"):
        make_discretisation("interval", 1.0, 8, lumped=False)
    with pytest.raises(ValueError, match="exactly one of `refine` and `nodes`"):
        disk_p1(1.0)
