"""Linear (Turing) analysis: dispersion relation, admissible modes, verdicts and critical ratios."""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, event, given, settings
from hypothesis import strategies as st
from scipy.optimize import brentq
from scipy.special import jvp

from harness.kinetics import Kinetics
from harness.linear import admissible_modes, critical_ratio, dispersion, growth_rates, linear_analysis

# ---------------------------------------------------------------------------------------------------------
# Kinetics used below
# ---------------------------------------------------------------------------------------------------------


def linear_kinetics(jac, diffusion, slow, conservation=None, ustar=None) -> Kinetics:
    """Kinetics ``f(u) = J (u - u*)``: its Jacobian is ``J`` everywhere."""
    jac = np.asarray(jac, dtype=float)
    n = jac.shape[0]
    ustar = np.zeros(n) if ustar is None else np.asarray(ustar, dtype=float)
    cons = np.zeros((0, n)) if conservation is None else np.asarray(conservation, dtype=float)
    return Kinetics(
        species=tuple(f"s{i}" for i in range(n)),
        diffusion=np.asarray(diffusion, dtype=float),
        slow=np.asarray(slow, dtype=bool),
        conservation=cons,
        reaction=lambda u: jac @ (u - ustar[:, None]),
        jacobian=lambda u: np.repeat(jac[:, :, None], u.shape[1], axis=2),
    )


def fun_brusselator(a: float, b: float, d_u: float, d_v: float) -> Kinetics:
    """Brusselator ``u' = a - (b + 1) u + u^2 v``, ``v' = b u - u^2 v``, ``u`` slow (Prigogine & Lefever 1968)."""

    def reaction(s):
        u, v = s
        return np.array([a - (b + 1) * u + u * u * v, b * u - u * u * v])

    def jacobian(s):
        u, v = s
        return np.array([[-(b + 1) + 2 * u * v, u * u], [b - 2 * u * v, -u * u]])

    return Kinetics(("u", "v"), np.array([d_u, d_v]), np.array([True, False]), np.zeros((0, 2)), reaction, jacobian)


def sol_brusselator(a: float, b: float) -> np.ndarray:
    """Its HSS ``(a, b / a)``."""
    return np.array([a, b / a])


def fun_schnakenberg(a: float, b: float, d: float) -> Kinetics:
    """Schnakenberg ``u' = a - u + u^2 v``, ``v' = b - u^2 v``, ``D_u = 1``, ``D_v = d``, u slow (Schnakenberg 1979)."""

    def reaction(s):
        u, v = s
        return np.array([a - u + u * u * v, b - u * u * v])

    def jacobian(s):
        u, v = s
        return np.array([[-1 + 2 * u * v, u * u], [-2 * u * v, -u * u]])

    return Kinetics(("u", "v"), np.array([1.0, d]), np.array([True, False]), np.zeros((0, 2)), reaction, jacobian)


def sol_schnakenberg(a: float, b: float) -> np.ndarray:
    """Its HSS ``(a + b, b / (a + b)^2)``."""
    return np.array([a + b, b / (a + b) ** 2])


def murray_conditions(jac: np.ndarray, d: float) -> bool:
    """The four Turing conditions for ``D_u = 1, D_v = d`` (Murray 2003, Mathematical Biology II, ch. 2)."""
    (fu, fv), (gu, gv) = jac
    det = fu * gv - fv * gu
    return bool(fu + gv < 0 and det > 0 and d * fu + gv > 0 and (d * fu + gv) ** 2 > 4 * d * det)


def murray_critical(jac: np.ndarray) -> tuple[float, float]:
    """Critical ``d_c`` and ``k_c^2`` (Murray 2003, Mathematical Biology II, ch. 2, with his scale gamma = 1).

    ``d_c`` is the root of ``fu^2 d^2 + 2 (2 fv gu - fu gv) d + gv^2 = 0`` with ``d fu + gv > 0``, and
    ``k_c^2 = (d_c fu + gv) / (2 d_c)``.
    """
    (fu, fv), (gu, gv) = jac
    roots = np.roots([fu * fu, 2 * (2 * fv * gu - fu * gv), gv * gv]).real
    d_c = float(next(r for r in roots if r * fu + gv > 0))
    return d_c, (d_c * fu + gv) / (2 * d_c)


# Jacobians with Murray's sign pattern (fu > 0, gv < 0, fv gu < 0), well-mixed stable (invented examples).
MURRAY_JACOBIANS = [
    [[1.0, -1.0], [2.0, -1.5]],
    [[0.5, 1.0], [-1.0, -1.0]],
    [[2.0, -3.0], [4.0, -5.0]],
    [[0.8, 1.0], [-1.8, -1.0]],
]

# ---------------------------------------------------------------------------------------------------------
# Dispersion relation
# ---------------------------------------------------------------------------------------------------------


def test_growth_rates_match_closed_form_for_two_species(rng):
    """Leading real part of a 2x2 ``J - k^2 D`` equals tr/2 + Re sqrt(tr^2/4 - det) (common practice)."""
    jac = rng.normal(size=(2, 2))
    diffusion = np.array([0.3, 2.0])
    k2 = np.logspace(-3, 2, 50)
    tr = jac.trace() - k2 * diffusion.sum()
    det = (jac[0, 0] - k2 * diffusion[0]) * (jac[1, 1] - k2 * diffusion[1]) - jac[0, 1] * jac[1, 0]
    expected = tr / 2 + np.sqrt((tr**2 / 4 - det).astype(complex)).real
    np.testing.assert_allclose(growth_rates(jac, diffusion, k2), expected, rtol=1e-12, atol=1e-12)
    eig = dispersion(jac, diffusion, k2)
    assert eig.shape == (50, 2)
    np.testing.assert_allclose(eig[:, 0].real, expected, rtol=1e-12, atol=1e-12)
    assert np.all(eig[:, 0].real >= eig[:, 1].real)


def test_conserved_zero_left_out_only_at_k_zero():
    """At k = 0 the conserved direction's zero is dropped; for k > 0 it is ~ -k^2 E (first-order perturbation)."""
    fu, fv, du, dv = 0.5, 2.0, 0.1, 1.0
    jac = np.array([[fu, fv], [-fu, -fv]])  # rows sum to zero: u + v is conserved
    cons = np.array([[1.0, 1.0]])
    diffusion = np.array([du, dv])
    assert growth_rates(jac, diffusion, np.array([0.0]), cons)[0] == pytest.approx(fu - fv)
    assert growth_rates(jac, diffusion, np.array([0.0]))[0] == pytest.approx(0.0, abs=1e-14)
    eig = dispersion(jac, diffusion, np.array([0.0, 1e-6]), cons)
    assert eig[0, 0] == pytest.approx(fu - fv) and np.isnan(eig[0, 1])
    # E = (du fv - dv fu) / (fv - fu) for this Jacobian (derived here from W = (1, 1), V = (fv, -fu)).
    e_eff = (du * fv - dv * fu) / (fv - fu)
    assert eig[1, 0].real == pytest.approx(-1e-6 * e_eff, rel=1e-4)


def test_growth_rates_reject_bad_input():
    """Negative squared wavenumbers and mis-shaped diffusion are refused."""
    jac = np.eye(2)
    with pytest.raises(ValueError, match="`k2`"):
        growth_rates(jac, np.ones(2), np.array([-1.0]))
    with pytest.raises(ValueError, match="`diffusion`"):
        growth_rates(jac, np.ones(3), np.array([1.0]))


# ---------------------------------------------------------------------------------------------------------
# Turing conditions and critical ratios against closed forms
# ---------------------------------------------------------------------------------------------------------


@pytest.mark.parametrize("jac", MURRAY_JACOBIANS)
def test_critical_ratio_and_wavenumber_match_murray(jac):
    """critical_ratio = 1/d_c and the fastest k at d_c is k_c (Murray 2003, Mathematical Biology II, ch. 2)."""
    jac = np.asarray(jac)
    d_c, k2_c = murray_critical(jac)
    kin = linear_kinetics(jac, [1.0, 3.0 * d_c], [True, False])
    rho = critical_ratio(kin, np.zeros(2))
    assert rho == pytest.approx(1 / d_c, rel=1e-9)
    at_onset = linear_analysis(linear_kinetics(jac, [1.0, d_c], [True, False]), np.zeros(2), "interval", (10.0,))
    assert at_onset.fastest_growth == pytest.approx(0.0, abs=1e-9)
    assert at_onset.fastest_k**2 == pytest.approx(k2_c, rel=1e-4)
    above = linear_analysis(linear_kinetics(jac, [1.0, 1.05 * d_c], [True, False]), np.zeros(2), "interval", (10.0,))
    below = linear_analysis(linear_kinetics(jac, [1.0, 0.95 * d_c], [True, False]), np.zeros(2), "interval", (10.0,))
    assert above.line_turing_unstable and not below.line_turing_unstable
    assert above.band[0] ** 2 < k2_c < above.band[1] ** 2
    assert murray_conditions(jac, 1.05 * d_c) and not murray_conditions(jac, 0.95 * d_c)


@pytest.mark.parametrize("jac", MURRAY_JACOBIANS)
def test_band_edges_are_roots_of_det(jac):
    """Band edges solve det(J - k^2 D) = 0 (Murray 2003, Mathematical Biology II, ch. 2: h(k^2) = 0)."""
    jac = np.asarray(jac)
    d = 2.0 * murray_critical(jac)[0]
    verdict = linear_analysis(linear_kinetics(jac, [1.0, d], [True, False]), np.zeros(2), "interval", (10.0,))
    (fu, fv), (gu, gv) = jac
    roots = np.sort(np.roots([d, -(d * fu + gv), fu * gv - fv * gu]).real)
    np.testing.assert_allclose(np.square(verdict.band), roots, rtol=1e-10)


def test_activator_fast_gives_no_ratio():
    """With the activator declared fast no slow/fast ratio <= 1 destabilises (Murray's d > 1 condition)."""
    jac = np.asarray(MURRAY_JACOBIANS[0])
    kin = linear_kinetics(jac, [10.0, 1.0], [False, True])
    assert critical_ratio(kin, np.zeros(2)) is None


def test_brusselator_onset_and_hopf():
    """Line growth changes sign at b_c = (1 + a sqrt(Du/Dv))^2, Hopf at 1 + a^2 (Murray 2003; common practice)."""
    a, d_u, d_v = 2.0, 1.0, 10.0
    b_c = (1 + a * math.sqrt(d_u / d_v)) ** 2

    def growth(b: float) -> float:
        kin = fun_brusselator(a, b, d_u, d_v)
        return linear_analysis(kin, sol_brusselator(a, b), "interval", (50.0,)).fastest_growth

    for b in (2.0, 2.9, 4.0):
        kin = fun_brusselator(a, b, d_u, d_v)
        np.testing.assert_allclose(kin.f(sol_brusselator(a, b)), 0.0, atol=1e-12)
    assert brentq(growth, 2.0, 3.0, xtol=1e-12) == pytest.approx(b_c, abs=1e-6)
    hopf = 1 + a * a
    for b, stable in ((hopf - 1e-6, True), (hopf + 1e-6, False)):
        verdict = linear_analysis(fun_brusselator(a, b, d_u, d_v), sol_brusselator(a, b), "interval", (50.0,))
        assert verdict.well_mixed_stable is stable
        assert verdict.line_turing_unstable is stable  # b > b_c here: diffusion-driven only while stable
    # the same onset as a ratio: b = (1 + a sqrt(rho))^2 solved for rho
    b = 2.5
    rho_c = ((math.sqrt(b) - 1) / a) ** 2
    assert critical_ratio(fun_brusselator(a, b, d_u, d_v), sol_brusselator(a, b)) == pytest.approx(rho_c, rel=1e-9)


@pytest.mark.parametrize(
    ("a", "b", "d"),
    [
        (0.1, 0.9, 5.0),
        (0.1, 0.9, 12.0),
        (0.1, 0.9, 40.0),
        (0.2, 1.0, 10.0),
        (0.2, 1.0, 30.0),
        (0.3, 1.2, 20.0),
        (0.05, 0.5, 30.0),
        (1.0, 1.0, 50.0),
    ],
)
def test_schnakenberg_turing_conditions(a, b, d):
    """HSS (a+b, b/(a+b)^2) and the verdict equals Murray's four conditions (Schnakenberg 1979; Murray 2003)."""
    kin = fun_schnakenberg(a, b, d)
    hss = sol_schnakenberg(a, b)
    np.testing.assert_allclose(kin.f(hss), 0.0, atol=1e-12)
    verdict = linear_analysis(kin, hss, "interval", (200.0,))
    assert verdict.line_turing_unstable is murray_conditions(kin.jac(hss), d)


def test_schnakenberg_points_cover_both_sides():
    """The Schnakenberg points above include stable, Turing-unstable and well-mixed-unstable cases."""
    flags = {
        murray_conditions(fun_schnakenberg(a, b, d).jac(sol_schnakenberg(a, b)), d)
        for a, b, d in [(0.1, 0.9, 5.0), (0.1, 0.9, 12.0)]
    }
    assert flags == {True, False}
    jac = fun_schnakenberg(0.05, 0.5, 30.0).jac(sol_schnakenberg(0.05, 0.5))
    assert np.trace(jac) > 0


@pytest.mark.parametrize("b", [1.5, 2.5, 2.9, 3.0, 3.5, 4.5])
def test_ratio_and_verdict_agree_on_brusselator(b):
    """The case's own ratio lies below the line's critical ratio exactly when the line is Turing unstable."""
    a, d_u, d_v = 2.0, 1.0, 8.0
    verdict = linear_analysis(fun_brusselator(a, b, d_u, d_v), sol_brusselator(a, b), "interval", (40.0,))
    rho_c = verdict.critical_ratio_line
    assert verdict.ratio == pytest.approx(d_u / d_v)
    assert verdict.line_turing_unstable is (rho_c is not None and verdict.ratio < rho_c)


def test_mass_conserved_long_wave_band_and_ratios():
    """Conserved 2-species: band (0, k_hi), rho_c = fu/fv, domain onset fu/(fv + Dv k1^2) (derived from det)."""
    fu, fv, d_u, d_v, length = 0.5, 2.0, 0.1, 1.0, 10.0
    jac = np.array([[fu, fv], [-fu, -fv]])
    kin = linear_kinetics(jac, [d_u, d_v], [True, False], conservation=[[1.0, 1.0]])
    verdict = linear_analysis(kin, np.zeros(2), "interval", (length,))
    # det(J - k^2 D) = k^2 (Du fv - Dv fu + k^2 Du Dv): negative for 0 < k^2 < (Dv fu - Du fv) / (Du Dv).
    assert verdict.well_mixed_stable and verdict.line_turing_unstable and verdict.turing_unstable
    assert verdict.band[0] == 0.0
    assert verdict.band[1] ** 2 == pytest.approx((d_v * fu - d_u * fv) / (d_u * d_v), rel=1e-10)
    assert verdict.critical_ratio_line == pytest.approx(fu / fv, rel=1e-9)
    k1_sq = (math.pi / length) ** 2
    assert verdict.critical_ratio_domain == pytest.approx(fu / (fv + d_v * k1_sq), rel=1e-9)


# ---------------------------------------------------------------------------------------------------------
# Admissible modes
# ---------------------------------------------------------------------------------------------------------


def test_interval_modes():
    """Interval modes are k = n pi / L, k = 0 first (common practice)."""
    length = 3.0
    modes = admissible_modes("interval", (length,), 40.0)
    n = np.arange(int(math.sqrt(40.0) * length / math.pi) + 1)
    np.testing.assert_allclose(modes.k, n * math.pi / length, rtol=1e-14)
    assert modes.labels == tuple((int(i),) for i in n)
    assert np.all(modes.multiplicity == 1)


def test_rectangle_modes():
    """Rectangle modes are k^2 = (n pi/Lx)^2 + (m pi/Ly)^2 (common practice), sorted, all present."""
    lx, ly, k2_max = 2.0, 3.0, 30.0
    modes = admissible_modes("rectangle", (lx, ly), k2_max)
    expected = sorted(
        ((n * math.pi / lx) ** 2 + (m * math.pi / ly) ** 2, (n, m))
        for n in range(20)
        for m in range(20)
        if (n * math.pi / lx) ** 2 + (m * math.pi / ly) ** 2 <= k2_max
    )
    np.testing.assert_allclose(modes.k2, [k2 for k2, _ in expected], rtol=1e-14)
    assert set(modes.labels) == {label for _, label in expected}
    for k2, (n, m) in zip(modes.k2, modes.labels):
        assert k2 == pytest.approx((n * math.pi / lx) ** 2 + (m * math.pi / ly) ** 2)
    assert modes.labels[0] == (0, 0)


def test_disk_modes_are_bessel_derivative_zeros():
    """Disk modes solve J_m'(k R) = 0, first j'_{1,1}, j'_{2,1}, j'_{0,1} (Abramowitz & Stegun 1964, table 9.5)."""
    radius = 2.0
    modes = admissible_modes("disk", (radius,), (12.0 / radius) ** 2)
    assert modes.labels[:4] == ((0, 0), (1, 1), (2, 1), (0, 1))
    np.testing.assert_allclose(modes.k[1:4] * radius, [1.8412, 3.0542, 3.8317], atol=1e-4)
    for (m, _), k in zip(modes.labels[1:], modes.k[1:]):
        assert abs(jvp(m, k * radius)) < 1e-10
    assert all(mult == (1 if m == 0 else 2) for (m, _), mult in zip(modes.labels, modes.multiplicity))


def test_disk_modes_miss_no_zero():
    """Every sign change of J_m' on (0, x_max] is a listed mode (brute-force count on a fine grid)."""
    x_max = 15.0
    modes = admissible_modes("disk", (1.0,), x_max**2)
    x = np.linspace(1e-6, x_max, 30_001)
    for m in range(int(x_max) + 2):
        values = jvp(m, x)
        changes = int(np.sum(np.sign(values[1:]) * np.sign(values[:-1]) < 0))
        listed = sum(1 for mm, s in modes.labels if mm == m and s > 0)
        assert listed == changes, f"m={m}: {listed} listed, {changes} sign changes"


def test_admissible_modes_reject_bad_input():
    """Unknown shapes and mis-sized domains are refused with the valid choices named."""
    with pytest.raises(ValueError, match="`shape` must be one of"):
        admissible_modes("torus", (1.0,), 1.0)
    with pytest.raises(ValueError, match="`size` of a rectangle"):
        admissible_modes("rectangle", (1.0,), 1.0)
    with pytest.raises(ValueError, match="`k2_max`"):
        admissible_modes("interval", (1.0,), -1.0)


# ---------------------------------------------------------------------------------------------------------
# Finite domains
# ---------------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(("shape", "size", "k_first"), [("interval", 1.0, math.pi), ("disk", 1.0, 1.8412)])
def test_small_domain_admits_no_unstable_mode(shape, size, k_first):
    """A domain whose first mode lies above the band is not turing_unstable while the line is."""
    a, b, d_u, d_v = 2.0, 3.0, 1.0, 10.0
    kin = fun_brusselator(a, b, d_u, d_v)
    verdict = linear_analysis(kin, sol_brusselator(a, b), shape, (size,))
    assert verdict.line_turing_unstable
    assert verdict.band[1] < k_first  # 1.8412 = j'_{1,1} (Abramowitz & Stegun 1964, table 9.5)
    assert not verdict.turing_unstable and not verdict.domain_unstable
    assert verdict.mode_growth < 0
    assert verdict.critical_ratio_domain < verdict.critical_ratio_line
    large = linear_analysis(kin, sol_brusselator(a, b), shape, (40.0,))
    assert large.turing_unstable
    assert large.band[0] <= large.mode_k <= large.band[1]


def test_domain_onset_is_where_first_mode_crosses():
    """At the domain's critical ratio the fastest admissible mode is neutral and all others decay."""
    a, b, d_v, length = 2.0, 3.0, 10.0, 3.0
    kin = fun_brusselator(a, b, 1.0, d_v)
    hss = sol_brusselator(a, b)
    rho = linear_analysis(kin, hss, "interval", (length,)).critical_ratio_domain
    modes = admissible_modes("interval", (length,), 100.0)
    rates = growth_rates(kin.jac(hss), np.array([rho * d_v, d_v]), modes.k2[1:])
    assert rates.max() == pytest.approx(0.0, abs=1e-9)
    assert np.sum(rates > -1e-6) == 1


def test_huge_domain_is_treated_as_the_line():
    """A domain with more than 5000 modes below the band's top takes the line's verdict (documented limit)."""
    a, b = 2.0, 3.0
    kin = fun_brusselator(a, b, 1.0, 10.0)
    verdict = linear_analysis(kin, sol_brusselator(a, b), "interval", (1e5,))
    assert verdict.domain_unstable and verdict.turing_unstable
    assert verdict.mode_label is None and verdict.mode_k == verdict.fastest_k


def test_critical_ratio_function_matches_verdict():
    """critical_ratio without and with a domain gives the verdict's line and domain ratios."""
    a, b = 2.0, 3.0
    kin = fun_brusselator(a, b, 1.0, 10.0)
    hss = sol_brusselator(a, b)
    verdict = linear_analysis(kin, hss, "disk", (3.0,))
    assert critical_ratio(kin, hss) == verdict.critical_ratio_line
    assert critical_ratio(kin, hss, "disk", 3.0) == verdict.critical_ratio_domain
    assert verdict.critical_ratio_domain < verdict.critical_ratio_line


def test_immobile_activator_band_never_ends():
    """With D_u = 0 and f_u > 0 growth tends to f_u as k -> inf: band to inf, fastest k = inf."""
    jac = np.array([[0.5, 1.0], [-2.0, -1.5]])
    kin = linear_kinetics(jac, [0.0, 1.0], [True, False])
    verdict = linear_analysis(kin, np.zeros(2), "rectangle", (5.0, 5.0))
    assert verdict.well_mixed_stable and verdict.line_turing_unstable and verdict.turing_unstable
    assert math.isinf(verdict.band[1]) and math.isinf(verdict.fastest_k)
    assert verdict.fastest_growth == pytest.approx(0.5)
    assert verdict.mode_label is None and verdict.fastest_wavelength == 0.0


# ---------------------------------------------------------------------------------------------------------
# Spike limit (Holmes 2014, Bull. Math. Biol., "An efficient, nonlinear stability analysis for detecting
# pattern formation in reaction diffusion systems"): D_slow -> 0, D_fast -> inf
# ---------------------------------------------------------------------------------------------------------


def _draw_jacobian(seed: int, n: int, n_slow: int) -> np.ndarray:
    """A random ``n x n`` matrix shifted to be stable, then its slow diagonal raised.

    Entries uniform on [-3, 3], shifted so the eigenvalues have real parts <= -margin (margin in
    [0.05, 1]). Half the draws then raise the slow diagonal by up to 3, the other half just past the point
    where the slow block turns unstable, so that local instability with the whole still stable (filtered
    afterwards) is common. Drawn with numpy from a hypothesis seed: hypothesis's preference for simple
    floats (0, +-3) mostly yields degenerate matrices.
    """
    rng = np.random.default_rng(seed)
    a = rng.uniform(-3.0, 3.0, (n, n))
    a -= (np.linalg.eigvals(a).real.max() + rng.uniform(0.05, 1.0)) * np.eye(n)
    if rng.random() < 0.5:
        boost = rng.uniform(0.0, 3.0)
    else:
        boost = -_local_growth(a, n_slow) + rng.uniform(0.0, 1.0)
    a[:n_slow, :n_slow] += boost * np.eye(n_slow)
    return a


def _spike_kinetics(jac: np.ndarray, n_slow: int, eps: float) -> Kinetics:
    n = jac.shape[0]
    slow = np.arange(n) < n_slow
    return linear_kinetics(jac, np.where(slow, eps, 1 / eps), slow)


def _local_growth(jac: np.ndarray, n_slow: int) -> float:
    return float(np.linalg.eigvals(jac[:n_slow, :n_slow]).real.max())


EPSILONS = st.sampled_from([1e-4, 1e-5, 1e-6])
SEEDS = st.integers(0, 2**32 - 1)
# About 75 % of the draws fail the assumptions, by design (a stable whole, a clear local sign). Hypothesis's
# filter health check can then fail a run at random before the first examples count (the three-species test
# failed in 2 of 4 full local runs and passed alone, the failure text not kept; this is the likely cause).
# The 200 examples that count are unchanged.
FILTERED = {"suppress_health_check": [HealthCheck.filter_too_much]}


@settings(max_examples=200, deadline=None, **FILTERED)
@given(seed=SEEDS, eps=EPSILONS)
def test_spike_limit_two_species_line(seed, eps):
    """2 species: line Turing instability in the spike limit iff the local block J_ss is unstable (Holmes 2014)."""
    jac = _draw_jacobian(seed, 2, 1)
    scale = np.abs(jac).max()
    assume(np.linalg.eigvals(jac).real.max() < -0.01 * scale)
    local = _local_growth(jac, 1)
    assume(abs(local) > 0.05 * scale)
    event("J_ss unstable" if local > 0 else "J_ss stable")
    verdict = linear_analysis(_spike_kinetics(jac, 1, eps), np.zeros(2), "interval", (1.0,))
    assert verdict.well_mixed_stable
    assert verdict.line_turing_unstable is (local > 0)


@settings(max_examples=200, deadline=None, **FILTERED)
@given(seed=SEEDS, n_slow=st.sampled_from([1, 2]), eps=EPSILONS)
def test_spike_limit_three_species_domain(seed, n_slow, eps):
    """3 species, 1 or 2 slow: on a fixed domain, Turing instability in the spike limit iff J_ss is unstable.

    Holmes 2014 for the equivalence; on the unbounded line only "J_ss unstable => unstable" holds (see the
    counterexample below), so the converse is checked on the interval of length 1.
    """
    jac = _draw_jacobian(seed, 3, n_slow)
    scale = np.abs(jac).max()
    assume(np.linalg.eigvals(jac).real.max() < -0.01 * scale)
    local = _local_growth(jac, n_slow)
    assume(abs(local) > 0.05 * scale)
    event("J_ss unstable" if local > 0 else "J_ss stable")
    verdict = linear_analysis(_spike_kinetics(jac, n_slow, eps), np.zeros(3), "interval", (1.0,))
    assert verdict.turing_unstable is (local > 0)
    if local > 0:
        assert verdict.line_turing_unstable


def test_line_instability_without_spike_instability_three_species():
    """Regression: two fast species can destabilise the line at k ~ sqrt(eps) while J_ss is stable.

    The modes involved have ``k^2 D_fast = O(|J|)``, so they leave every fixed domain as ``D_fast -> inf``:
    the spike-limit equivalence holds on domains, not on the unbounded line (found by random search here).
    """
    jac = np.array([[-1.25, 0.64, 2.38], [0.18, -0.36, 1.40], [2.80, -2.46, -2.61]])
    assert np.linalg.eigvals(jac).real.max() < 0 and _local_growth(jac, 1) < 0
    eps = 1e-6
    verdict = linear_analysis(_spike_kinetics(jac, 1, eps), np.zeros(3), "interval", (1.0,))
    assert verdict.line_turing_unstable and not verdict.turing_unstable
    assert verdict.fastest_k**2 / eps == pytest.approx(1.0, rel=0.5)


# ---------------------------------------------------------------------------------------------------------
# Equivalence with brute force: dense scans over k and over the modes
# ---------------------------------------------------------------------------------------------------------


def _random_system(seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray | None]:
    """Random 2- or 3-species Jacobian (a third of them mass-conserving), diffusion and slow split."""
    rng = np.random.default_rng(seed)
    n = int(rng.integers(2, 4))
    jac = rng.uniform(-3.0, 3.0, (n, n))
    cons = None
    if rng.random() < 1 / 3:
        w, u = np.ones(n), rng.uniform(0.2, 1.0, n)
        jac = (np.eye(n) - np.outer(u, w) / (w @ u)) @ jac  # w @ jac == 0
        cons = w[None]
    diffusion = 10 ** rng.uniform(-2.0, 1.0, n)
    slow = np.arange(n) < int(rng.integers(1, n))
    return jac, diffusion, slow, cons


def _dense_sup(jac: np.ndarray, diffusion: np.ndarray) -> float:
    """Largest growth on 20 000 log-spaced k in [1e-4, 1e6] (below 1e-4 a conserved mode is round-off)."""
    k = np.logspace(-4, 6, 20_000)
    return float(growth_rates(jac, diffusion, k * k).max())


@settings(max_examples=100, deadline=None)
@given(seed=SEEDS)
def test_verdict_matches_dense_scans(seed):
    """The line and domain flags, the fastest growth and the critical ratio agree with dense brute force."""
    jac, diffusion, slow, cons = _random_system(seed)
    kin = linear_kinetics(jac, diffusion, slow, conservation=cons)
    verdict = linear_analysis(kin, np.zeros(jac.shape[0]), "interval", (10.0,))
    dense = _dense_sup(jac, diffusion)
    assume(abs(dense) > 1e-6)
    assert verdict.fastest_growth >= dense - 1e-12
    assert verdict.fastest_growth == pytest.approx(dense, rel=1e-3, abs=1e-6)
    assert verdict.line_turing_unstable is (verdict.well_mixed_stable and dense > 0)
    modes = admissible_modes("interval", (10.0,), 1e4)
    domain = float(growth_rates(jac, diffusion, modes.k2[1:]).max())
    assume(abs(domain) > 1e-9)
    assert verdict.domain_unstable is (domain > 0)


def _scaled(diffusion: np.ndarray, slow: np.ndarray, rho: float) -> np.ndarray:
    """Slow coefficients scaled together so that max(D_slow) / min(D_fast) = rho."""
    return np.where(slow, rho * diffusion[~slow].min() * diffusion / diffusion[slow].max(), diffusion)


# Only 12-34 % of the draws are well-mixed stable with an onset: the filtering is inherent, not a bad strategy.
@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.filter_too_much])
@given(seed=SEEDS, n=st.sampled_from([2, 3]), conserved=st.booleans())
def test_critical_ratios_match_dense_scans(seed, n, conserved):
    """Just below the critical ratios the line (domain) has an unstable k (mode), just above none."""
    rng = np.random.default_rng(seed)
    n_slow = int(rng.integers(1, n))
    jac = _draw_jacobian(seed, n, n_slow)
    cons = None
    if conserved:
        w, u = np.ones(n), rng.uniform(0.2, 1.0, n)
        jac = (np.eye(n) - np.outer(u, w) / (w @ u)) @ jac  # w @ jac == 0
        cons = w[None]
    diffusion = 10 ** rng.uniform(-1.0, 1.0, n)
    slow = np.arange(n) < n_slow
    verdict = linear_analysis(linear_kinetics(jac, diffusion, slow, cons), np.zeros(n), "interval", (5.0,))
    assume(verdict.well_mixed_stable and verdict.critical_ratio_line is not None)
    rho = verdict.critical_ratio_line
    assert _dense_sup(jac, _scaled(diffusion, slow, 0.97 * rho)) > 0
    assert _dense_sup(jac, _scaled(diffusion, slow, 1.03 * rho)) <= 0
    rho_domain = verdict.critical_ratio_domain
    event("domain ratio found" if rho_domain is not None else "no domain ratio")
    if rho_domain is not None:
        assert rho_domain <= rho * (1 + 1e-9)
        k2 = admissible_modes("interval", (5.0,), 1e5).k2[1:]
        assert growth_rates(jac, _scaled(diffusion, slow, 0.97 * rho_domain), k2).max() > 0
        assert growth_rates(jac, _scaled(diffusion, slow, 1.03 * rho_domain), k2).max() <= 0
