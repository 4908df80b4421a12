"""Finite volumes on uniform grids: spectra, conservation, layout."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg as sla

from solvers.grids import interval_fv, rectangle_fv, zero_row_sums


def sol_fv_neumann_1d(length: float, cells: int) -> np.ndarray:
    """Eigenvalues of the 3-point Neumann Laplacian, ``(2 - 2 cos(n pi / N)) / h^2`` (common practice)."""
    h = length / cells
    return (2.0 - 2.0 * np.cos(np.arange(cells) * np.pi / cells)) / h**2


def generalized_spectrum(disc) -> np.ndarray:
    """Sorted eigenvalues of ``K v = lambda M v``, dense (small grids only)."""
    return np.sort(sla.eigh(disc.stiffness.toarray(), disc.mass.toarray(), eigvals_only=True))


@pytest.mark.parametrize(("length", "cells"), [(1.0, 7), (10.0, 40), (0.3, 64)])
def test_interval_spectrum_closed_form(length, cells):
    """The FV interval reproduces the closed-form 3-point Neumann spectrum (common practice)."""
    disc = interval_fv(length, cells)
    lam = generalized_spectrum(disc)
    ref = np.sort(sol_fv_neumann_1d(length, cells))
    np.testing.assert_allclose(lam, ref, rtol=1e-10, atol=1e-10 * ref.max())


def test_rectangle_spectrum_is_sum_of_1d():
    """The 5-point rectangle spectrum is the sum of the two 1D spectra (common practice)."""
    lx, ly, nx, ny = 2.0, 3.0, 6, 5
    lam = generalized_spectrum(rectangle_fv(lx, ly, nx, ny))
    ref = np.sort(np.add.outer(sol_fv_neumann_1d(lx, nx), sol_fv_neumann_1d(ly, ny)).ravel())
    np.testing.assert_allclose(lam, ref, rtol=1e-10, atol=1e-10 * ref.max())


@pytest.mark.parametrize(
    "disc",
    [interval_fv(3.0, 17), rectangle_fv(1.0, 1.0, 9, 9), rectangle_fv(2.0, 3.3, 13, 7)],
    ids=["interval", "square", "rectangle"],
)
def test_conservation_exact(disc):
    """``K @ 1`` and ``1 @ K`` are exactly zero, ``K`` is symmetric PSD, weights sum to the measure."""
    k = disc.stiffness
    one = np.ones(disc.m)
    assert np.all(k @ one == 0.0)
    assert np.all(one @ k == 0.0)
    assert abs(k - k.T).max() == 0.0
    assert np.linalg.eigvalsh(k.toarray()).min() > -1e-12 * abs(k).max()
    assert disc.weights.sum() == pytest.approx(np.prod(disc.size), rel=1e-14)
    np.testing.assert_array_equal(disc.mass.diagonal(), disc.weights)
    assert disc.lumped and disc.method == "fv"


def test_rectangle_node_order_is_c():
    """Cell ``(i, j)`` is node ``i * ny + j``, centred at ``((i + 1/2) hx, (j + 1/2) hy)``."""
    lx, ly, nx, ny = 2.0, 1.0, 4, 3
    disc = rectangle_fv(lx, ly, nx, ny)
    assert disc.grid == (nx, ny)
    i, j = 2, 1
    np.testing.assert_allclose(disc.coords[i * ny + j], [(i + 0.5) * lx / nx, (j + 0.5) * ly / ny])
    # neighbours along y are adjacent nodes, along x they are ny apart
    k = disc.stiffness
    assert k[i * ny + j, i * ny + j + 1] < 0 and k[i * ny + j, (i + 1) * ny + j] < 0
    assert k[i * ny + j, i * ny + j + 2] == 0


def test_zero_row_sums_changes_entries_at_round_off_only(rng):
    """Balancing a random symmetric Laplacian moves entries by round-off and zeroes the row sums exactly."""
    a = rng.random((30, 30))
    a = np.triu(a, 1) * (rng.random((30, 30)) < 0.3)
    off = -(a + a.T)
    lap = off - np.diag(off.sum(axis=1))
    bal = zero_row_sums(lap).toarray()
    assert np.all(bal.sum(axis=1) == 0.0)
    assert np.abs(bal - lap).max() < 1e-13 * np.abs(lap).max()


@pytest.mark.parametrize(
    ("args", "match"),
    [((0.0, 10), "`length`"), ((1.0, 1), "`cells`"), ((1.0, 2.5), "`cells`"), ((np.inf, 4), "`length`")],
)
def test_interval_bad_input(args, match):
    """Bad lengths and cell counts raise a ValueError naming the argument."""
    with pytest.raises(ValueError, match=match):
        interval_fv(*args)
