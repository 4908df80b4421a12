"""Initial states: pulse conventions and compensation, noise reproducibility and resolution independence."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
from scipy.interpolate import RegularGridInterpolator

from solvers.fem import disk_p1, interval_p1, rectangle_p1
from solvers.grids import interval_fv, rectangle_fv
from solvers.starts import noise_state, pulse_point, pulse_profile, pulse_state

DISCS = {
    "interval-fv": lambda: interval_fv(10.0, 200),
    "interval-p1": lambda: interval_p1(10.0, 200),
    "rectangle-fv": lambda: rectangle_fv(4.0, 2.0, 40, 20),
    "rectangle-p1": lambda: rectangle_p1(4.0, 2.0, 40, 20),
    "disk-p1": lambda: disk_p1(1.5, refine=4),
}


def totals(disc, state: np.ndarray, rows: np.ndarray) -> np.ndarray:
    """Conserved totals ``rows @ (state @ weights)``."""
    return np.atleast_2d(rows) @ (state @ disc.weights)


@pytest.mark.parametrize("name", sorted(DISCS))
@pytest.mark.parametrize("where", ["edge", "centre"])
def test_compensated_pulse_keeps_totals(name, where):
    """With compensation every conserved total equals the baseline's to 1e-12, and the pulse is as asked."""
    disc = DISCS[name]()
    base = np.array([0.4, 2.0, 1.0])
    rows = np.array([[1.0, 1.0, 0.0], [0.0, 2.0, 1.0]])  # two laws; the pulse on species 0, two absorbers
    state = pulse_state(disc, base, [0], 0.8, 0.2, where=where, compensate=rows)
    flat = np.repeat(base[:, None], disc.m, 1)
    np.testing.assert_allclose(totals(disc, state, rows), totals(disc, flat, rows), rtol=1e-12)
    shifts = state[1:] - base[1:, None]
    assert np.ptp(shifts, axis=1).max() < 1e-15  # spread uniformly
    assert np.all(shifts[0] < 0)


def test_single_law_shifts_the_fast_species_by_mass_over_measure():
    """One law ``a + c``: ``c`` drops by exactly the pulse's integral divided by the measure."""
    disc = interval_fv(10.0, 400)
    state = pulse_state(disc, [0.3, 2.0], [0], 1.5, 0.1, compensate=[1.0, 1.0])
    added = disc.weights @ (state[0] - 0.3)
    np.testing.assert_allclose(state[1], 2.0 - added / 10.0, rtol=1e-14)


def test_compensation_without_laws_is_plain_pulse():
    """An empty set of conservation rows (a model without laws) leaves the plain pulse."""
    disc = interval_fv(5.0, 50)
    plain = pulse_state(disc, [0.3, 2.0], [0], 0.5, 0.3)
    np.testing.assert_array_equal(pulse_state(disc, [0.3, 2.0], [0], 0.5, 0.3, compensate=np.zeros((0, 2))), plain)


def test_pulse_height_and_width_convention_same_in_1d_and_2d():
    """Peak added is ``height``; at one ``width`` from the centre it is ``height e^-1/2``, in 1D and 2D alike."""
    height, width = 0.7, 0.25
    line = interval_p1(4.0, 80)
    plane = rectangle_p1(4.0, 2.0, 80, 40)
    u1 = pulse_state(line, [0.1, 1.0], [0], height, width, where="centre")[0] - 0.1
    u2 = pulse_state(plane, [0.1, 1.0], [0], height, width, where="centre")[0] - 0.1
    x = line.coords[:, 0]
    assert u1.max() == pytest.approx(height, rel=1e-14)
    np.testing.assert_allclose(u1[np.isclose(x, 2.0 + width)], height * np.exp(-0.5), rtol=1e-12)
    row = np.isclose(plane.coords[:, 1], 1.0)
    order = np.argsort(plane.coords[row, 0])
    np.testing.assert_allclose(u2[row][order], u1, rtol=1e-12, atol=1e-300)


@pytest.mark.parametrize("cells", [40, 400])
def test_fv_pulse_mass_is_exact_half_gaussian(cells):
    """FV cell averages integrate exactly: edge pulse mass ``h w sqrt(pi/2)`` in 1D, ``h pi w^2`` in 2D."""
    height, width = 2.0, 0.3
    line = interval_fv(10.0, cells)
    assert line.weights @ pulse_profile(line, pulse_point(line), width) * height == pytest.approx(
        height * width * np.sqrt(np.pi / 2), rel=1e-12
    )
    plane = rectangle_fv(10.0, 6.0, cells, cells // 2)
    assert plane.weights @ pulse_profile(plane, pulse_point(plane), width) * height == pytest.approx(
        height * np.pi * width**2, rel=1e-12
    )


def test_pulse_points():
    """Edge and centre follow the documented conventions on each shape."""
    np.testing.assert_array_equal(pulse_point(interval_fv(3.0, 4)), [0.0])
    np.testing.assert_array_equal(pulse_point(rectangle_fv(3.0, 2.0, 4, 4)), [0.0, 1.0])
    np.testing.assert_array_equal(pulse_point(disk_p1(2.0, refine=1)), [2.0, 0.0])
    np.testing.assert_array_equal(pulse_point(disk_p1(2.0, refine=1), "centre"), [0.0, 0.0])
    with pytest.raises(ValueError, match="outside"):
        pulse_point(disk_p1(2.0, refine=1), [1.5, 1.5])


def test_negative_concentration_raises_naming_height():
    """A compensation, or a negative pulse, that would push a species below zero raises naming `height`."""
    disc = interval_fv(10.0, 100)
    with pytest.raises(ValueError, match="`height`"):
        pulse_state(disc, [0.3, 0.01], [0], 1.5, 0.1, compensate=[1.0, 1.0])
    with pytest.raises(ValueError, match="`height`"):
        pulse_state(disc, [0.3, 2.0], [0], -0.5, 0.1, where="centre")
    # a species that is negative at baseline (a deviation variable) may stay negative
    state = pulse_state(disc, [-0.3, 2.0], [0], 0.1, 0.2)
    assert state[0].min() == pytest.approx(-0.3)


def test_underresolved_pulse_warns():
    """A width below half the node spacing is reported, not silently accepted."""
    with pytest.warns(UserWarning, match="under-resolved"):
        pulse_state(interval_fv(10.0, 100), [0.3, 2.0], [0], 1.0, 0.02)


@pytest.mark.parametrize("name", sorted(DISCS))
def test_noise_amplitude_mean_and_seed(name):
    """Noise has the asked RMS, zero weighted mean, is reproducible by seed and differs between seeds."""
    disc = DISCS[name]()
    base = np.array([1.0, 2.0, 3.0])
    a = noise_state(disc, base, 1e-2, seed=7, correlation=0.5)
    eta = a - base[:, None]
    measure = disc.weights.sum()
    np.testing.assert_allclose(np.sqrt(eta**2 @ disc.weights / measure), 1e-2, rtol=1e-12)
    np.testing.assert_allclose(eta @ disc.weights, 0.0, atol=1e-14 * measure)
    np.testing.assert_array_equal(a, noise_state(disc, base, 1e-2, seed=7, correlation=0.5))
    assert np.abs(a - noise_state(disc, base, 1e-2, seed=8, correlation=0.5)).max() > 1e-3
    only = noise_state(disc, base, 1e-2, seed=7, species_idx=[1], correlation=0.5)
    np.testing.assert_array_equal(only[[0, 2]], np.repeat(base[[0, 2], None], disc.m, 1))
    np.testing.assert_array_equal(only[1], a[1])  # a species' field does not depend on the others


def test_noise_resolution_independent_1d():
    """The same seed on 100 and 1000 cells gives the same field (after interpolation) and the same RMS."""
    coarse, fine = interval_fv(10.0, 100), interval_fv(10.0, 1000)
    kw = {"amplitude": 1e-3, "seed": 3, "correlation": 1.0}
    uc = noise_state(coarse, [0.5, 0.5], **kw)[0] - 0.5
    uf = noise_state(fine, [0.5, 0.5], **kw)[0] - 0.5
    on_coarse = np.interp(coarse.coords[:, 0], fine.coords[:, 0], uf)
    err = np.sqrt(coarse.weights @ (on_coarse - uc) ** 2 / 10.0) / 1e-3
    assert err < 2e-3, f"relative L2 difference {err:.3g}"


def test_noise_resolution_independent_2d_and_p1_vs_fv():
    """Rectangle: FV 32x16 and 128x64 agree, and a P1 mesh of the same domain agrees with both."""
    kw = {"amplitude": 1.0, "seed": 11, "correlation": 0.8}
    coarse, fine = rectangle_fv(4.0, 2.0, 32, 16), rectangle_fv(4.0, 2.0, 128, 64)
    uc = noise_state(coarse, [5.0], **kw)[0]
    uf = noise_state(fine, [5.0], **kw)[0]
    xs, ys = (np.unique(fine.coords[:, d]) for d in range(2))
    interp = RegularGridInterpolator((xs, ys), uf.reshape(fine.grid), bounds_error=False, fill_value=None)
    err = np.sqrt(coarse.weights @ (interp(coarse.coords) - uc) ** 2 / 8.0)
    assert err < 0.015, f"relative L2 difference FV coarse vs fine {err:.3g}"
    p1 = rectangle_p1(4.0, 2.0, 64, 32)
    up = noise_state(p1, [5.0], **kw)[0]
    err = np.sqrt(p1.weights @ (interp(p1.coords) - up) ** 2 / 8.0)
    assert err < 0.015, f"relative L2 difference P1 vs FV {err:.3g}"


def test_noise_negative_and_aliasing_guards():
    """Noise that would push a species below zero raises naming `amplitude`; a too-coarse grid warns."""
    disc = interval_fv(10.0, 100)
    with pytest.raises(ValueError, match="`amplitude`"):
        noise_state(disc, [1e-3, 1.0], 1e-2, seed=1)
    with pytest.warns(UserWarning, match="aliased"):
        noise_state(disc, [1.0, 1.0], 1e-3, seed=1, correlation=0.1)
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        noise_state(disc, [1.0, 1.0], 1e-3, seed=1)
