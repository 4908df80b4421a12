"""Rightmost eigenvalues of discrete linearisations against closed forms; conserved-mode deflation."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg as sla
import scipy.sparse as sp

from solvers.fem import interval_p1
from solvers.grids import interval_fv, rectangle_fv
from solvers.stability import is_stable, rightmost_eigenvalues, spectrum


def sol_fv_laplacian_1d(length: float, cells: int) -> np.ndarray:
    """Eigenvalues of the 3-point Neumann Laplacian ``(2 - 2 cos(n pi / N)) / h^2`` (common practice)."""
    h = length / cells
    return (2.0 - 2.0 * np.cos(np.arange(cells) * np.pi / cells)) / h**2


def two_species_jacobian(disc, reaction: np.ndarray, diffusion: np.ndarray) -> tuple[sp.spmatrix, sp.spmatrix]:
    """Mass-form ``J = kron(R, M) - kron(diag D, K)`` and ``B = kron(I, M)`` of a linear two-species system."""
    jac = sp.kron(reaction, disc.mass) - sp.kron(sp.diags(diffusion), disc.stiffness)
    return jac.tocsr(), sp.kron(sp.identity(2), disc.mass).tocsr()


def mode_spectrum(reaction: np.ndarray, diffusion: np.ndarray, laplacian: np.ndarray) -> np.ndarray:
    """All eigenvalues of ``R - mu diag D`` over the Laplacian eigenvalues ``mu``, by decreasing real part."""
    lam = np.concatenate([np.linalg.eigvals(reaction - mu * np.diag(diffusion)) for mu in laplacian])
    return lam[np.argsort(-lam.real)]


@pytest.mark.parametrize("form", ["mass", "lumped-rhs"])
@pytest.mark.parametrize("r", [-0.2, 0.05, 3.0])
def test_neumann_laplacian_plus_linear_reaction(form, r):
    """``-D L + r`` on the FV interval: rightmost eigenvalues ``-D (2 - 2cos(n pi/N))/h^2 + r`` (common practice)."""
    length, cells, d = 10.0, 200, 0.5
    disc = interval_fv(length, cells)
    jac = -d * disc.stiffness + r * disc.mass
    mass = disc.mass
    if form == "lumped-rhs":
        jac, mass = sp.diags(1.0 / disc.weights) @ jac, None
    ref = np.sort(-d * sol_fv_laplacian_1d(length, cells) + r)[::-1][:6]
    lam = rightmost_eigenvalues(jac, mass, k=6, shift=r + 0.1)
    np.testing.assert_allclose(lam.real, ref, rtol=1e-9, atol=1e-11)
    np.testing.assert_allclose(lam.imag, 0.0, atol=1e-9)
    assert is_stable(jac, mass, shift=r + 0.1) == (r < 0)


def test_rectangle_spectrum_sum_of_1d():
    """On a 16 x 8 FV rectangle the rightmost eigenvalues are sums of the 1D ones (common practice)."""
    disc = rectangle_fv(4.0, 2.0, 16, 8)
    d, r = 0.3, 0.4
    jac = -d * disc.stiffness + r * disc.mass
    lap = np.add.outer(sol_fv_laplacian_1d(4.0, 16), sol_fv_laplacian_1d(2.0, 8)).ravel()
    ref = np.sort(-d * lap + r)[::-1][:8]
    lam = rightmost_eigenvalues(jac, disc.mass, k=8, shift=r + 0.1)
    np.testing.assert_allclose(lam.real, ref, rtol=1e-9, atol=1e-11)


@pytest.mark.parametrize("lumped", [True, False], ids=["lumped", "consistent"])
def test_conserved_zero_mode_is_removed(lumped):
    """A mass-conserved pair: the conserved zero eigenvalue goes, every other one matches the mode-wise 2x2."""
    disc = interval_p1(5.0, 60, lumped=lumped)
    reaction = np.array([[0.5, 1.5], [-0.5, -1.5]])  # f_2 = -f_1: a + c is conserved
    diffusion = np.array([0.01, 1.0])
    jac, mass = two_species_jacobian(disc, reaction, diffusion)
    # equivalence of two routes: the generalized Laplacian eigenvalues, dense, then 2x2 blocks per mode
    mu = sla.eigh(disc.stiffness.toarray(), disc.mass.toarray(), eigvals_only=True)
    ref = mode_spectrum(reaction, diffusion, mu)
    ref = ref[np.abs(ref) > 1e-8][:6]
    q = np.kron([1.0, 1.0], disc.weights)
    found = spectrum(jac, mass, k=6, conserved=q, shift=0.2)  # inside the spectrum: it moves
    assert found.removed == 1 and found.converged
    np.testing.assert_allclose(found.eigenvalues, ref, rtol=1e-8, atol=1e-10)


@pytest.mark.parametrize("lumped", [True, False], ids=["lumped", "consistent"])
def test_conserved_zero_mode_decides_verdict_only_when_not_deflated(lumped):
    """Equal diffusion, stable kinetics: the zero mode is rightmost unless deflated; the verdict is stable."""
    disc = interval_p1(5.0, 60, lumped=lumped)
    reaction = np.array([[-0.5, 1.5], [0.5, -1.5]])  # eigenvalues 0 and -2
    jac, mass = two_species_jacobian(disc, reaction, np.array([1.0, 1.0]))
    q = np.kron([1.0, 1.0], disc.weights)
    plain = rightmost_eigenvalues(jac, mass, k=3, shift=0.1)
    assert abs(plain[0]) < 1e-9
    deflated = rightmost_eigenvalues(jac, mass, k=3, conserved=q, shift=0.1)
    mu = sla.eigh(disc.stiffness.toarray(), disc.mass.toarray(), eigvals_only=True)
    ref = mode_spectrum(reaction, np.array([1.0, 1.0]), mu)
    np.testing.assert_allclose(deflated, ref[np.abs(ref) > 1e-8][:3], rtol=1e-8)
    assert is_stable(jac, mass, conserved=q)


def _oscillatory_system():
    """Three species on an FV interval with one conservation law and an oscillatory pair: f_1 = -f_2, so
    c = (1, 1, 0) is conserved; the other two directions oscillate (-0.1 +- 1.36i at k = 0). Returns the sparse
    Jacobian, mass, the closed-form spectrum without the conserved zero, and the conserved vector."""
    disc = interval_fv(4.0, 50)
    reaction = np.array([[-0.2, 0.3, -1.0], [0.2, -0.3, 1.0], [0.0, -2.0, 0.3]])
    diffusion = np.array([0.02, 1.0, 0.05])
    jac = (sp.kron(reaction, disc.mass) - sp.kron(sp.diags(diffusion), disc.stiffness)).tocsr()
    mass = sp.kron(sp.identity(3), disc.mass).tocsr()
    ref = mode_spectrum(reaction, diffusion, sol_fv_laplacian_1d(4.0, 50))
    return jac, mass, ref[np.abs(ref) > 1e-8], np.kron([1.0, 1.0, 0.0], disc.weights)


def test_deflation_keeps_complex_pairs_and_verdicts():
    """Three species with one conservation law and an oscillatory pair: deflation keeps the pair exactly."""
    jac, mass, ref, q = _oscillatory_system()
    ref = ref[:6]
    lam = rightmost_eigenvalues(jac, mass, k=12, conserved=q, shift=1.0)[:6]
    np.testing.assert_allclose(np.sort_complex(lam), np.sort_complex(ref), rtol=1e-8, atol=1e-10)
    assert np.abs(lam.imag).max() > 1.0  # the oscillatory pair is among the rightmost six
    assert is_stable(jac, mass, conserved=q, k=12, shift=1.0) == bool(ref[0].real <= 0)


def test_radius_certifies_what_was_found():
    """Every eigenvalue within `radius` of the shift is listed; with small ``k`` the pair falls outside it."""
    jac, mass, ref, q = _oscillatory_system()
    for k in (4, 6, 12):
        found = spectrum(jac, mass, k=k, conserved=q, shift=1.0)
        inside = ref[np.abs(ref - found.shift) < found.radius * (1 - 1e-9)]
        assert inside.size <= k
        assert all(np.abs(found.eigenvalues - z).min() < 1e-8 for z in inside)
    pair = ref[np.argmax(np.abs(ref[:6].imag))]
    small = spectrum(jac, mass, k=4, conserved=q, shift=1.0)
    assert np.abs(small.eigenvalues - pair).min() > 1e-3  # missed although among the rightmost six...
    assert abs(pair - small.shift) > small.radius  # ...and outside the certified disc


def test_bad_input():
    """Wrong shapes, dependent conserved vectors and impossible ``k`` raise ValueError naming the argument."""
    disc = interval_fv(1.0, 10)
    jac = -disc.stiffness
    with pytest.raises(ValueError, match="`mass`"):
        spectrum(jac, sp.identity(5))
    with pytest.raises(ValueError, match="`conserved`"):
        spectrum(jac, disc.mass, conserved=np.ones(7))
    with pytest.raises(ValueError, match="linearly independent"):
        spectrum(jac, disc.mass, conserved=np.ones((10, 2)))
    with pytest.raises(ValueError, match="`k`"):
        spectrum(jac, disc.mass, k=9)
