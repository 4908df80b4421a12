"""Homogeneous steady states: all of them in a box, the baseline, and the baseline followed along a sweep."""

from __future__ import annotations

import numpy as np
import pytest

from harness.equilibria import (
    baseline_hss,
    default_box,
    find_hss,
    follow_baseline,
    trace_baseline,
)
from harness.kinetics import Kinetics

from .plain_kinetics import kinetics


def cubic(a: float) -> Kinetics:
    """Bistable cubic ``du/dt = u (1 - u) (u - a)`` (common practice)."""
    return kinetics(
        lambda u: u * (1 - u) * (u - a), lambda u: ((1 - u) * (u - a) - u * (u - a) + u * (1 - u))[None], ["u"], [True]
    )


def toggle(alpha: float) -> Kinetics:
    """Symmetric toggle switch ``du/dt = alpha/(1 + v^2) - u``, ``dv/dt = alpha/(1 + u^2) - v``
    (Gardner, Cantor & Collins 2000, Nature, with Hill exponent 2)."""

    def f(u):
        x, y = u
        return np.array([alpha / (1 + y**2) - x, alpha / (1 + x**2) - y])

    def jac(u):
        x, y = u
        one = np.ones_like(x)
        return np.array([[-one, -2 * alpha * y / (1 + y**2) ** 2], [-2 * alpha * x / (1 + x**2) ** 2, -one]])

    return kinetics(f, jac, ["u", "v"], [True, False])


def membrane(k0: float, gamma: float = 1.0, K: float = 1.0, delta: float = 1.0) -> Kinetics:
    """Mass-conserved membrane/cytosol exchange: ``f = c (k0 + gamma a^2/(K^2 + a^2)) - delta a``,
    ``da/dt = f``, ``dc/dt = -f`` (the wave-pinning kinetics of Mori, Jilkine & Edelstein-Keshet 2008)."""

    def f(u):
        a, c = u
        r = c * (k0 + gamma * a**2 / (K**2 + a**2)) - delta * a
        return np.array([r, -r])

    def jac(u):
        a, c = u
        ra = c * gamma * 2 * a * K**2 / (K**2 + a**2) ** 2 - delta
        rc = k0 + gamma * a**2 / (K**2 + a**2)
        return np.array([[ra, rc], [-ra, -rc]])

    return kinetics(f, jac, ["a", "c"], [True, False], [[1.0, 1.0]])


def membrane_hss(k0: float, total: float, gamma: float = 1.0, K: float = 1.0, delta: float = 1.0) -> np.ndarray:
    """HSS values of ``a`` by an independent route: with ``c = T - a``, ``f = 0`` times ``K^2 + a^2`` is the
    cubic ``(T - a)(k0 (K^2 + a^2) + gamma a^2) - delta a (K^2 + a^2) = 0``; its real roots in ``[0, T]``."""
    p = np.polysub(np.polymul([-1.0, total], [k0 + gamma, 0.0, k0 * K**2]), [delta, 0.0, delta * K**2, 0.0])
    r = np.roots(p)
    r = np.sort(r[np.abs(r.imag) < 1e-9].real)
    return r[(r >= 0) & (r <= total)]


def cusp(r: float) -> Kinetics:
    """Shifted cusp normal form ``du/dt = r + (u - 2) - (u - 2)^3`` (common practice): three HSS for
    ``|r| < 2 / (3 sqrt 3)``, folds at ``r = +-2 / (3 sqrt 3)``."""
    return kinetics(lambda u: r + (u - 2) - (u - 2) ** 3, lambda u: (1 - 3 * (u - 2) ** 2)[None], ["u"], [True])


def cusp_roots(r: float) -> np.ndarray:
    """Real roots of ``x^3 - x - r = 0`` shifted by 2, sorted (numpy.roots as the independent route)."""
    x = np.roots([1.0, 0.0, -1.0, -r])
    return np.sort(x[np.abs(x.imag) < 1e-9].real) + 2


def test_cubic_finds_all_three():
    """All three HSS 0, a, 1 of the bistable cubic, with eigenvalues f'(u) = -a, a(1 - a), a - 1."""
    a = 0.3
    found = find_hss(cubic(a), None, [-0.5], [2.0])
    states = np.array([e.state[0] for e in found])
    np.testing.assert_allclose(states, [0.0, a, 1.0], atol=1e-12)
    eig = np.array([e.eigenvalues[0].real for e in found])
    np.testing.assert_allclose(eig, [-a, a * (1 - a), a - 1], atol=1e-12)
    assert [e.stable for e in found] == [True, False, True]
    assert max(e.residual for e in found) < 1e-12


def test_cubic_box_limits_the_search():
    """Only the HSS inside the region of interest are returned."""
    found = find_hss(cubic(0.3), None, [0.2], [2.0])
    np.testing.assert_allclose([e.state[0] for e in found], [0.3, 1.0], atol=1e-12)


def test_toggle_switch_three_then_one():
    """Toggle switch: the symmetric HSS solves u^3 + u - alpha = 0; for alpha > 2 two asymmetric ones
    u, v = (alpha -+ sqrt(alpha^2 - 4)) / 2 exist too (with uv = 1, u = alpha/(1 + v^2) becomes
    u^2 - alpha u + 1 = 0, derived here). They are stable; the symmetric one is then a saddle."""
    alpha = 3.0
    found = find_hss(toggle(alpha), None, [0.0, 0.0], [10.0, 10.0])
    sym = np.roots([1.0, 0.0, 1.0, -alpha])
    sym = float(sym[np.abs(sym.imag) < 1e-12].real[0])
    lo, hi = (alpha - np.sqrt(alpha**2 - 4)) / 2, (alpha + np.sqrt(alpha**2 - 4)) / 2
    expected = np.array([[lo, hi], [sym, sym], [hi, lo]])
    np.testing.assert_allclose(np.array([e.state for e in found]), expected, atol=1e-10)
    assert [e.stable for e in found] == [True, False, True]
    below = find_hss(toggle(1.5), None, [0.0, 0.0], [10.0, 10.0])
    assert len(below) == 1 and below[0].stable


@pytest.mark.parametrize(("k0", "total"), [(0.067, 2.27), (0.01, 3.0), (0.01, 2.0)])
def test_mass_conserved_hss_match_cubic(k0, total):
    """With a + c = T fixed, the HSS are the roots of a cubic in a (numpy.roots as the independent route);
    k0 = 0.01, T = 3 has three of them. Every state keeps the total, and the zero is left out."""
    found = find_hss(membrane(k0), [total], [0.0, 0.0], [10.0, 10.0])
    expected = membrane_hss(k0, total)
    np.testing.assert_allclose([e.state[0] for e in found], expected, atol=1e-10)
    for e in found:
        assert e.state.sum() == pytest.approx(total, abs=1e-12)
        assert e.eigenvalues.shape == (1,)
    if k0 == 0.01 and total == 3.0:
        assert len(found) == 3 and [e.stable for e in found] == [True, False, True]


def test_reduced_eigenvalue_of_exchange_model():
    """Mass-conserved exchange: on a + c = T the one eigenvalue is f_a - f_c (derived by projecting J)."""
    kin = membrane(0.067)
    (eq,) = find_hss(kin, [2.27], [0.0, 0.0], [10.0, 10.0])
    j = kin.jac(eq.state)
    assert eq.eigenvalues[0].real == pytest.approx(j[0, 0] - j[0, 1], rel=1e-12)


def test_find_hss_is_deterministic():
    """The same seed gives the same states, bit for bit."""
    one = find_hss(toggle(3.0), None, [0.0, 0.0], [10.0, 10.0], seed=7)
    two = find_hss(toggle(3.0), None, [0.0, 0.0], [10.0, 10.0], seed=7)
    assert all(np.array_equal(a.state, b.state) for a, b in zip(one, two))


def test_totals_must_match_the_laws():
    """A wrong number of totals is refused, naming the argument."""
    with pytest.raises(ValueError, match="`totals`"):
        find_hss(membrane(0.067), [1.0, 2.0], [0.0, 0.0], [10.0, 10.0])


def test_default_box():
    """Nonnegative box reaching ten times the guess (at least 10); a negative guess gets the mirror."""
    lo, hi = default_box(np.array([0.5, 3.0, -2.0]))
    np.testing.assert_array_equal(lo, [0.0, 0.0, -20.0])
    np.testing.assert_array_equal(hi, [10.0, 30.0, 0.0])


def test_baseline_is_nearest_the_guess():
    """From a guess near each HSS of the cubic, the baseline is that HSS."""
    for guess, expected in [(0.05, 0.0), (0.35, 0.3), (0.9, 1.0)]:
        eq = baseline_hss(cubic(0.3), [guess])
        assert eq.state[0] == pytest.approx(expected, abs=1e-12)


def test_baseline_takes_totals_from_guess():
    """A conserved model's baseline keeps the guess's total and matches the cubic's root."""
    eq = baseline_hss(membrane(0.067), [0.3, 1.97])
    assert eq.state.sum() == pytest.approx(2.27, abs=1e-12)
    assert eq.state[0] == pytest.approx(membrane_hss(0.067, 2.27)[0], abs=1e-10)


def test_follow_baseline_stays_on_its_branch():
    """Across a sweep where all three HSS of the cusp exist, the lower branch is followed throughout."""
    rs = np.linspace(-0.3, 0.3, 25)
    states = follow_baseline([cusp(r) for r in rs], [1.0], rs)
    got = np.array([e.state[0] for e in states])
    np.testing.assert_allclose(got, [cusp_roots(r)[0] for r in rs], atol=1e-10)


def test_follow_baseline_middle_branch():
    """The unstable middle branch is followed too, without falling onto the stable ones."""
    rs = np.linspace(-0.35, 0.35, 15)
    states = follow_baseline([cusp(r) for r in rs], [2.0])
    np.testing.assert_allclose([e.state[0] for e in states], [cusp_roots(r)[1] for r in rs], atol=1e-10)
    assert not any(e.stable for e in states)


def test_follow_baseline_lost_at_fold():
    """Past the fold at r = 2/(3 sqrt 3) the lower branch is lost (None, with a reason), never swapped for
    the upper one."""
    rs = np.linspace(-0.3, 0.6, 19)
    trace = trace_baseline([cusp(r) for r in rs], [1.0], rs)
    fold = 2 / (3 * np.sqrt(3))
    for r, eq, why in zip(rs, trace.states, trace.reasons):
        if r < fold - 0.02:
            assert eq is not None and eq.state[0] == pytest.approx(cusp_roots(r)[0], abs=1e-10)
        elif r > fold:
            assert eq is None and "fold" in why


def test_follow_baseline_conserved_sweep():
    """A conserved model followed over k0 keeps the guess's total at every point and the cubic's root."""
    k0s = np.linspace(0.02, 0.12, 21)
    states = follow_baseline([membrane(k) for k in k0s], [0.1, 2.17], k0s)
    for k, eq in zip(k0s, states):
        assert eq.state.sum() == pytest.approx(2.27, abs=1e-12)
        assert eq.state[0] == pytest.approx(membrane_hss(k, 2.27)[0], abs=1e-10)
