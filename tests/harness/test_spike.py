"""Spike-limit analysis: local states, spike stability, the two threshold routes and the regimes."""

from __future__ import annotations

import numpy as np
import pytest

from harness.equilibria import Equilibrium, baseline_hss, equilibrium
from harness.kinetics import Kinetics
from harness.spike import REGIMES, local_eigenvalues, local_states, spike_analysis

from .plain_kinetics import kinetics

K0 = 0.067  # wave-pinning basal rate, gamma = K = delta = 1 (Mori, Jilkine & Edelstein-Keshet 2008; from memory)




def membrane(k0: float = K0) -> Kinetics:
    """Membrane ``a`` (slow) / cytosol ``c`` (fast): ``f = c (k0 + a^2/(1 + a^2)) - a``, ``da/dt = f``,
    ``dc/dt = -f``, so ``a + c`` is conserved."""

    def f(u):
        a, c = u
        r = c * (k0 + a**2 / (1 + a**2)) - a
        return np.array([r, -r])

    def jac(u):
        a, c = u
        ra = c * 2 * a / (1 + a**2) ** 2 - 1
        rc = k0 + a**2 / (1 + a**2)
        return np.array([[ra, rc], [-ra, -rc]])

    return kinetics(f, jac, ["a", "c"], [True, False], [[1.0, 1.0]])


def membrane_local_roots(c: float, k0: float = K0) -> np.ndarray:
    """Local states at fixed ``c``: ``f = 0`` times ``1 + a^2`` is ``-a^3 + c (k0 + 1) a^2 - a + c k0 = 0``."""
    r = np.roots([-1.0, c * (k0 + 1), -1.0, c * k0])
    return np.sort(r[np.abs(r.imag) < 1e-9].real)


def membrane_hss(total: float, k0: float = K0) -> float:
    """The HSS's ``a`` for ``a + c = T``: the one real root of ``(T - a)(k0 + (k0 + 1) a^2) - a (1 + a^2)``."""
    p = np.polysub(np.polymul([-1.0, total], [k0 + 1, 0.0, k0]), [1.0, 0.0, 1.0, 0.0])
    r = np.roots(p)
    (a,) = r[np.abs(r.imag) < 1e-9].real
    return float(a)


def brusselator(a: float, b: float) -> Kinetics:
    """Brusselator ``du/dt = a - (b + 1) u + u^2 v``, ``dv/dt = b u - u^2 v`` (Prigogine & Lefever 1968);
    ``u`` slow, ``v`` fast."""

    def f(x):
        u, v = x
        return np.array([a - (b + 1) * u + u**2 * v, b * u - u**2 * v])

    def jac(x):
        u, v = x
        return np.array([[-(b + 1) + 2 * u * v, u**2], [b - 2 * u * v, -(u**2)]])

    return kinetics(f, jac, ["u", "v"], [True, False])


def focus(mu: float, quintic: bool, omega: float = 1.0) -> Kinetics:
    """Two slow species ``X, Y`` around ``(1, 1)`` and a fast ``c`` (``dc/dt = 1 - c``). With ``x = X - 1``,
    ``y = Y - 1``, ``r^2 = x^2 + y^2``: ``dx/dt = g x - omega y``, ``dy/dt = omega x + g y`` with
    ``g = mu c - r^2`` (Stuart-Landau, supercritical Hopf) or ``g = mu c + r^2 - r^4`` (Bautin normal form,
    subcritical), so that ``dr/dt = g r`` (common practice)."""

    def g_of(r2, c):
        return (mu * c + r2 - r2**2, 1 - 2 * r2) if quintic else (mu * c - r2, -np.ones_like(r2))

    def f(u):
        big_x, big_y, c = u
        x, y = big_x - 1, big_y - 1
        g, _ = g_of(x * x + y * y, c)
        return np.array([g * x - omega * y, omega * x + g * y, 1 - c])

    def jac(u):
        big_x, big_y, c = u
        x, y = big_x - 1, big_y - 1
        g, gp = g_of(x * x + y * y, c)
        z = np.zeros_like(x)
        return np.array(
            [
                [g + 2 * x * x * gp, -omega + 2 * x * y * gp, mu * x],
                [omega + 2 * x * y * gp, g + 2 * y * y * gp, mu * y],
                [z, z, z - 1],
            ]
        )

    return kinetics(f, jac, ["X", "Y", "c"], [True, True, False])


def twin(eps: float = 1.0) -> Kinetics:
    """Two coupled bistable slow species and a fast ``c``: ``ds_i/dt = g(s_i) c + eps (s_j - s_i)``,
    ``g(s) = -(s - 1)(s - 2)(s - 3)``, ``dc/dt = 1 - c``."""

    def g(s):
        return -(s - 1) * (s - 2) * (s - 3)

    def gp(s):
        return -((s - 2) * (s - 3) + (s - 1) * (s - 3) + (s - 1) * (s - 2))

    def f(u):
        a, b, c = u
        return np.array([g(a) * c + eps * (b - a), g(b) * c + eps * (a - b), 1 - c])

    def jac(u):
        a, b, c = u
        z = np.zeros_like(a)
        return np.array([[gp(a) * c - eps, eps + z, g(a)], [eps + z, gp(b) * c - eps, g(b)], [z, z, z - 1]])

    return kinetics(f, jac, ["s1", "s2", "c"], [True, True, False])


def quadratic() -> Kinetics:
    """``da/dt = (a - 1/2)^2 - (a - 1/2) c``, ``dc/dt = 1 - c``: HSS (1/2, 1), local roots 1/2 (stable,
    slope -1) and 3/2 (unstable, slope +1), and beyond 3/2 the local ``a`` blows up in finite time."""

    def f(u):
        a, c = u
        x = a - 0.5
        return np.array([x * x - x * c, 1 - c])

    def jac(u):
        a, c = u
        x = a - 0.5
        z = np.zeros_like(a)
        return np.array([[2 * x - c, -x], [z, z - 1]])

    return kinetics(f, jac, ["a", "c"], [True, False])


def exchange() -> Kinetics:
    """Linear exchange ``da/dt = c - a = -dc/dt``: one local state, stable."""

    def f(u):
        a, c = u
        return np.array([c - a, a - c])

    def jac(u):
        one = np.ones_like(u[0])
        return np.array([[-one, one], [one, -one]])

    return kinetics(f, jac, ["a", "c"], [True, False], [[1.0, 1.0]])


@pytest.fixture(scope="module")
def wave():
    """Wave-pinning at T = 2.27 and its HSS (one HSS; three local states)."""
    kin = membrane()
    return kin, baseline_hss(kin, [0.27, 2.0])


def test_membrane_hss_and_local_states(wave):
    """HSS on a + c = 2.27 matches the cubic's one real root; the local states at c* are the three real
    roots of the local cubic (numpy.roots as the independent route): stable, unstable, stable."""
    kin, hss = wave
    a_star = membrane_hss(2.27)
    assert hss.state[0] == pytest.approx(a_star, abs=1e-10)
    states = local_states(kin, hss.state)
    roots = membrane_local_roots(hss.state[1])
    assert len(roots) == 3
    np.testing.assert_allclose([s.values[0] for s in states], roots, rtol=1e-10)
    assert [s.stable for s in states] == [True, False, True]
    assert [s.is_hss for s in states] == [True, False, False]


def test_membrane_threshold_two_routes(wave):
    """Threshold = (unstable local root - a*): route 1 and route 2 (bisection on ODE runs) agree with the
    hand-derived value to 1e-6, and the pulse reaches the upper local state."""
    kin, hss = wave
    roots = membrane_local_roots(hss.state[1])
    expected = roots[1] - hss.state[0]
    p = spike_analysis(kin, hss, ("a",), +1)
    assert p.regime == "pulse-triggered" and p.spike_stable and p.well_mixed_stable
    assert p.threshold_boundary == pytest.approx(expected, rel=1e-6)
    assert p.threshold_ode == pytest.approx(expected, rel=1e-6)
    assert p.threshold == p.threshold_up == pytest.approx(expected, rel=1e-6)
    assert p.ode_bracket[0] < expected < p.ode_bracket[1]
    assert p.target.values[0] == pytest.approx(roots[2], rel=1e-10)
    assert p.threshold_down is None and p.unbounded_above is None


def test_membrane_threshold_ode_without_hint(wave):
    """Route 2 on its own (scan and bisection, no hint from route 1) still lands within 1e-6."""
    kin, hss = wave
    expected = membrane_local_roots(hss.state[1])[1] - hss.state[0]
    p = spike_analysis(kin, hss, ("a",), +1, use_boundary_hint=False)
    assert p.threshold_ode == pytest.approx(expected, rel=1e-6)
    assert abs(p.threshold_ode - p.threshold_boundary) <= 1e-6 * p.threshold_boundary


def test_pulse_down_decays(wave):
    """Below a* there is no local root, so no downward pulse patterns; the upward threshold is still given."""
    kin, hss = wave
    p = spike_analysis(kin, hss, ("a",), -1)
    assert p.regime == "no-pattern" and p.threshold is None and p.threshold_down is None
    assert p.threshold_up == pytest.approx(membrane_local_roots(hss.state[1])[1] - hss.state[0], rel=1e-6)


def test_fast_pulse_has_no_effect(wave):
    """A pulse only on the fast species does nothing in the spike limit."""
    kin, hss = wave
    p = spike_analysis(kin, hss, ("c",))
    assert p.regime == "no-pattern" and p.threshold is None and "fast" in p.reason


def test_no_pattern():
    """Linear exchange: the only local state is the HSS, stable: no pattern, no threshold."""
    kin = exchange()
    p = spike_analysis(kin, baseline_hss(kin, [1.0, 1.0]), ("a",))
    assert p.regime == "no-pattern" and p.threshold is None and len(p.local_states) == 1


def test_self_patterning():
    """Wave-pinning at a* = 0.5 (T = 2.3727): f_a = 2 a c/(1 + a^2)^2 - 1 > 0 (spike-unstable) while
    f_a < f_c (well-mixed stable); the local dynamics settle on the upper local root."""
    kin = membrane()
    hss = baseline_hss(kin, [0.5, 1.8727])
    p = spike_analysis(kin, hss, ("a",))
    assert p.well_mixed_stable and not p.spike_stable
    assert p.regime == "self-patterning" and p.threshold is None
    assert p.target.values[0] == pytest.approx(membrane_local_roots(hss.state[1])[2], rel=1e-10)


def test_self_oscillating():
    """Stuart-Landau local dynamics with mu = 1/4 > 0: the HSS is an unstable focus (mu +- i), the local
    dynamics settle on the cycle r = sqrt(mu); carried: the HSS is well-mixed unstable too."""
    kin = focus(0.25, quintic=False)
    hss = baseline_hss(kin, [1.0, 1.0, 1.0])
    p = spike_analysis(kin, hss, ("X",))
    np.testing.assert_allclose(np.sort_complex(p.spike_eigenvalues), [0.25 - 1j, 0.25 + 1j], atol=1e-12)
    assert p.regime == "self-oscillating" and p.well_mixed_stable is False
    assert "well-mixed" in p.reason


def test_stable_focus_no_pattern():
    """Stuart-Landau with mu = -1/4: a stable focus and nothing else, so every pulse decays (ODE scan)."""
    kin = focus(-0.25, quintic=False)
    p = spike_analysis(kin, baseline_hss(kin, [1.0, 1.0, 1.0]), ("X",))
    assert p.regime == "no-pattern" and p.threshold is None and p.threshold_down is None


@pytest.mark.slow
def test_pulse_triggered_oscillation():
    """Bautin normal form with mu = -0.1: stable HSS inside an unstable cycle r_u^2 = (1 - sqrt(1 + 4 mu))/2
    and a stable one beyond (common practice); a pulse along X above r_u reaches the oscillation. Route 1
    does not apply (no unstable local state), route 2 finds r_u; by symmetry the same downwards."""
    mu = -0.1
    kin = focus(mu, quintic=True)
    p = spike_analysis(kin, baseline_hss(kin, [1.0, 1.0, 1.0]), ("X",))
    r_u = np.sqrt((1 - np.sqrt(1 + 4 * mu)) / 2)
    assert p.regime == "pulse-triggered" and p.target is None and "oscillation" in p.reason
    assert p.threshold_boundary is None
    assert p.threshold_ode == pytest.approx(r_u, rel=1e-6)
    assert p.threshold_down == pytest.approx(r_u, rel=1e-4)


def test_unbounded_beyond_threshold_is_no_pattern():
    """Local da/dt = x (x - 1), x = a - 1/2: beyond the unstable root 3/2 the spike blows up, so the regime
    is no-pattern with unbounded_above = threshold = 1 (derived), both routes agreeing."""
    kin = quadratic()
    p = spike_analysis(kin, baseline_hss(kin, [0.5, 1.0]), ("a",))
    assert p.regime == "no-pattern" and p.target is None
    assert p.threshold_boundary == pytest.approx(1.0, rel=1e-12)
    assert p.threshold_ode == pytest.approx(1.0, rel=1e-6)
    assert p.unbounded_above == pytest.approx(1.0, rel=1e-12)
    assert "without bound" in p.reason


def test_quartic_target_then_unbounded():
    """Local da/dt = (a - 1)(a - 2)(a - 3)(a - 4) c with HSS a* = 1: slopes -6, 2, -2, 6 at the roots, so a
    pulse above 1 reaches a = 3, and above 3 (beyond the root 4) grows without bound (derived)."""

    def f(u):
        a, c = u
        return np.array([(a - 1) * (a - 2) * (a - 3) * (a - 4) * c, 1 - c])

    def jac(u):
        a, c = u
        q = (a - 2) * (a - 3) * (a - 4) + (a - 1) * (a - 3) * (a - 4) + (a - 1) * (a - 2) * (a - 4)
        q = q + (a - 1) * (a - 2) * (a - 3)
        z = np.zeros_like(a)
        return np.array([[q * c, (a - 1) * (a - 2) * (a - 3) * (a - 4)], [z, z - 1]])

    kin = kinetics(f, jac, ["a", "c"], [True, False])
    p = spike_analysis(kin, baseline_hss(kin, [1.0, 1.0]), ("a",))
    assert p.regime == "pulse-triggered"
    assert p.threshold_boundary == pytest.approx(1.0, rel=1e-12)
    assert p.threshold_ode == pytest.approx(1.0, rel=1e-6)
    assert p.target.values[0] == pytest.approx(3.0, rel=1e-12)
    assert p.unbounded_above == pytest.approx(3.0, rel=1e-12)
    np.testing.assert_allclose(sorted(np.real(s.eigenvalues[0]) for s in p.local_states), [-6, -2, 2, 6], atol=1e-9)


def test_box_must_hold_the_hss(wave):
    """A local box that leaves out the HSS is refused."""
    kin, hss = wave
    with pytest.raises(ValueError, match="`lower` and `upper`"):
        spike_analysis(kin, hss, ("a",), lower=[1.0], upper=[5.0])


def test_unresolved_without_hss():
    """A lost HSS gives an unresolved point with its reason."""
    p = spike_analysis(exchange(), None, ("a",))
    assert p.regime == "unresolved" and p.reason


@pytest.mark.parametrize("b", [0.5, 0.9, 1.5, 3.0])
def test_brusselator_spike_instability(b):
    """Brusselator HSS (a, b/a); the local block is f_u = -(b + 1) + 2 u v = b - 1 there, so the HSS is
    spike-unstable iff b > 1 (derived from the model)."""
    a = 1.5
    kin = brusselator(a, b)
    hss = baseline_hss(kin, [a, b / a])
    np.testing.assert_allclose(hss.state, [a, b / a], rtol=1e-12)
    assert local_eigenvalues(kin, hss.state)[0].real == pytest.approx(b - 1, abs=1e-12)
    p = spike_analysis(kin, hss, ("u",))
    assert p.spike_stable is (b < 1)


def test_brusselator_local_roots_and_regimes():
    """At v* = b/a the local equation v* u^2 - (b + 1) u + a = 0 has roots a and a/b (derived). For b < 1
    the upper one, a/b, is unstable and beyond it u blows up: no-pattern, no threshold (growth is not a
    pattern), unbounded_above = a/b - a. For b > 1 the lower one is stable but upwards u blows up: unresolved,
    with the reason."""
    a = 1.5
    low = spike_analysis(brusselator(a, 0.5), baseline_hss(brusselator(a, 0.5), [a, 0.5 / a]), ("u",))
    np.testing.assert_allclose(sorted(s.values[0] for s in low.local_states), [a, a / 0.5], rtol=1e-10)
    assert low.regime == "no-pattern"
    assert low.threshold is None
    assert low.threshold_up == pytest.approx(a / 0.5 - a, rel=1e-6)
    assert low.unbounded_above == pytest.approx(a / 0.5 - a, rel=1e-6)
    high = spike_analysis(brusselator(a, 2.0), baseline_hss(brusselator(a, 2.0), [a, 2.0 / a]), ("u",))
    assert high.regime == "unresolved" and "without bound" in high.reason


def test_several_slow_saddle_on_ray():
    """Two coupled bistable species, pulse on both: the diagonal is invariant and its saddle (2, 2) is the
    boundary, so both routes give 1 (derived); the pulse reaches (3, 3)."""
    kin = twin()
    p = spike_analysis(kin, baseline_hss(kin, [1.0, 1.0, 1.0]), ("s1", "s2"), use_boundary_hint=False)
    assert p.regime == "pulse-triggered"
    assert p.threshold_boundary == pytest.approx(1.0, rel=1e-9)
    assert p.threshold_ode == pytest.approx(1.0, rel=1e-6)
    np.testing.assert_allclose(p.target.values, [3.0, 3.0], rtol=1e-9)


@pytest.mark.slow
def test_several_slow_boundary_off_saddle():
    """Pulse on s1 only: g is odd about 2, so the line s1 + s2 = 4 is invariant and is the saddle's stable
    manifold; the ray from (1, 1) crosses it at height 2 (derived). Route 1 does not apply; route 2 finds 2."""
    kin = twin()
    p = spike_analysis(kin, baseline_hss(kin, [1.0, 1.0, 1.0]), ("s1",))
    assert p.threshold_boundary is None
    assert p.threshold_ode == pytest.approx(2.0, rel=1e-6)
    assert p.regime == "pulse-triggered"


def test_several_slow_local_states_by_deflation():
    """Weak coupling (eps = 0.1) gives nine local states, the 3 x 3 products of the roots 1, 2, 3 moved
    by the coupling; the symmetric ones (1, 1), (2, 2), (3, 3) stay exact (derived)."""
    kin = twin(0.1)
    hss = baseline_hss(kin, [1.0, 1.0, 1.0])
    states = local_states(kin, hss.state)
    assert len(states) == 9
    for s in states:
        assert np.max(np.abs(kin.f(np.append(s.values, 1.0))[:2])) < 1e-10
    values = {tuple(np.round(s.values, 9)) for s in states}
    assert {(1.0, 1.0), (2.0, 2.0), (3.0, 3.0)} <= values
    assert sum(s.stable for s in states) == 4


def test_regime_names_and_bad_input(wave):
    """Regimes come from the design's list; bad sign or species are refused, naming the argument."""
    kin, hss = wave
    assert spike_analysis(kin, hss, ("a",)).regime in REGIMES
    with pytest.raises(ValueError, match="`sign`"):
        spike_analysis(kin, hss, ("a",), sign=0)
    with pytest.raises(ValueError, match="`pulse_species`"):
        spike_analysis(kin, hss, ("z",))


def test_equilibrium_wrapper_for_given_state():
    """An HSS handed in by the caller (here built by `equilibrium`) is analysed the same way."""
    kin = membrane()
    a = membrane_hss(2.27)
    hss: Equilibrium = equilibrium(kin, np.array([a, 2.27 - a]), [2.27])
    p = spike_analysis(kin, hss, ("a",))
    assert p.regime == "pulse-triggered"
