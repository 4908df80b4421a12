"""Continuation of the reduced system: normal forms, the Brusselator, wave-pinning and the demo's boundaries."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from scipy.optimize import brentq

from harness.case import load_case
from harness.cli import main
from harness.continuation import (
    bialternate_test,
    critical_ratio_curve,
    global_branch,
    hss_near,
    reduced_diagram,
    threshold_curves,
)
from harness.equilibria import baseline_hss, trace_baseline
from harness.figures import plane_path, plot_prediction
from harness.kinetics import Kinetics
from harness.linear import critical_ratio
from harness.model import build_model
from harness.periodic import VectorField, cycles_from_hopf, diagram_cycles
from harness.predict import predict_case, predict_diagram
from harness.spike import local_states

CASES = Path(__file__).resolve().parents[2] / "cases"


def _scalar_family(f, fx, fp):
    """Kinetics of a scalar ODE ``x' = f(x, p)`` with no slow species (so only well-mixed tests apply)."""

    def family(p: float) -> Kinetics:
        return Kinetics(
            species=("x",), diffusion=np.zeros(1), slow=np.array([False]), conservation=np.zeros((0, 1)),
            reaction=lambda u: f(u, p), jacobian=lambda u: fx(u, p)[None], dparam=lambda u: fp(u, p),
        )

    return family


def _kinds(branch, kind):
    return [pt for pt in branch.points if pt.kind == kind]


def test_saddle_node_fold_at_zero():
    """x' = p - x^2 folds at p = 0, x = 0 (common practice); the branch turns back through it."""
    family = _scalar_family(lambda u, p: p - u**2, lambda u, p: -2 * u, lambda u, p: np.ones_like(u))
    b = global_branch(family, np.array([1.0]), 1.0, (-1.0, 1.0), direction=-1)
    folds = _kinds(b, "fold")
    assert len(folds) == 1
    assert folds[0].parameter == pytest.approx(0.0, abs=1e-9)
    assert folds[0].state[0] == pytest.approx(0.0, abs=1e-6)
    assert b.states[-1, 0] < -0.9  # came back along the lower half
    assert np.all(b.stable[b.states[:, 0] > 1e-3]) and not np.any(b.stable[b.states[:, 0] < -1e-3])


@pytest.mark.parametrize("power", [2, 3])
def test_transcritical_and_pitchfork_branch_points(power):
    """x' = p x - x^2 and x' = p x - x^3 have a branch point on x = 0 at p = 0 (common practice), no fold."""
    family = _scalar_family(lambda u, p: p * u - u**power, lambda u, p: p - power * u ** (power - 1),
                            lambda u, p: u)
    b = global_branch(family, np.array([0.0]), -1.0, (-1.0, 1.0), typical=np.array([1.0]))
    branch = _kinds(b, "branch")
    assert len(branch) == 1
    assert branch[0].parameter == pytest.approx(0.0, abs=1e-9)
    assert not _kinds(b, "fold")
    assert np.allclose(b.states, 0.0, atol=1e-12)


def _brusselator(a: float = 2.0):
    case = load_case(CASES / "ref_1d_brusselator.toml", [f"a={a}"])
    model = build_model(case)
    return case, model, (lambda b: model.kinetics({**case.parameters, "b": b}, "b"))


def test_brusselator_well_mixed_hopf():
    """The Brusselator's HSS (a, b/a) has its Hopf point at b = 1 + a^2 with frequency a
    (Prigogine & Lefever 1968; common practice)."""
    a = 1.5
    _, _, family = _brusselator(a)
    b = global_branch(family, np.array([a, 2.0 / a]), 2.0, (2.0, 5.0))
    hopf = [pt for pt in b.points if pt.kind == "hopf" and pt.branch == "global"]
    assert len(hopf) == 1
    assert hopf[0].parameter == pytest.approx(1 + a**2, abs=1e-8)
    assert hopf[0].frequency == pytest.approx(a, rel=1e-7)
    assert np.allclose(b.states[:, 0], a) and np.allclose(b.states[:, 1], b.parameter / a)


def test_brusselator_local_transcritical_and_switched_branch():
    """Frozen v* = b/a, the local equation a - (b+1) s + s^2 v* = 0 has roots s = a and s = a/b, which cross
    at b = 1 (algebra, common practice): a branch point there, and the switched branch is s = a/b."""
    a = 2.0
    _, _, family = _brusselator(a)
    values = np.linspace(0.5, 2.0, 7)
    hss = [np.array([a, b / a]) for b in values]
    d = reduced_diagram(family, "b", values, hss, [[] for _ in values])
    bps = [pt for pt in d.points if pt.kind == "branch"]
    assert len(bps) == 1 and bps[0].parameter == pytest.approx(1.0, abs=1e-9)
    local = [br for br in d.branches if br.kind == "local"]
    assert local
    for br in local:
        np.testing.assert_allclose(br.local[:, 0], a / br.parameter, rtol=1e-9)
    covered = np.concatenate([br.parameter for br in local])
    assert covered.min() <= 0.5 + 1e-9 and covered.max() >= 2.0 - 1e-9


def test_bialternate_test_vanishes_for_imaginary_pair():
    """``prod (l_i + l_j)`` is 0 for a +-i w pair and positive for a stable focus (common practice)."""
    assert bialternate_test(np.array([[0.0, -2.0], [2.0, 0.0]])) == pytest.approx(0.0, abs=1e-14)
    assert bialternate_test(np.array([[-1.0, -2.0], [2.0, -1.0]])) == pytest.approx(-2.0)


def _wave_pinning_diagram(stop: float):
    """Diagram of the wave-pinning case over k0 in [0, stop], seeded the way predict seeds it."""
    case = load_case(CASES / "ref_1d_wave_pinning.toml")
    model = build_model(case)
    values = np.linspace(0.0, stop, 15)
    kins = [model.kinetics({**case.parameters, "k0": v}, "k0") for v in values]
    guess = np.array([case.guess[s] for s in model.species])
    trace = trace_baseline(kins, guess, values)
    hss = [None if eq is None else eq.state for eq in trace.states]
    locs = [[st.values for st in local_states(k, u) if not st.is_hss] if u is not None else []
            for k, u in zip(kins, hss)]
    family = lambda p: model.kinetics({**case.parameters, "k0": p}, "k0")  # noqa: E731
    return reduced_diagram(family, "k0", values, hss, locs), float(model.totals(case.guess)[0])


def test_wave_pinning_branch_points_and_local_fold_against_root_scan():
    """Branch points and local folds of wave-pinning (f = b (k0 + a^2/(1 + a^2)) - a, a + b = T) equal the
    roots of independent closed conditions, refined by brentq here (algebra, common practice):
    branch points where the local slope b* 2a/(1 + a^2)^2 - 1 vanishes at the HSS (k0 = a/(T - a) -
    a^2/(1 + a^2)); local folds where f = f_s = 0 at s != a*, i.e. b* = (1 + s^2)^2 / (2 s),
    k0 = s/b* - s^2/(1 + s^2), with the HSS a* = T - b* solving f(a*, b*) = 0."""
    stop = 0.14
    d, total = _wave_pinning_diagram(stop)

    def k0_hss(a):
        return a / (total - a) - a**2 / (1 + a**2)

    def slope(a):
        return (total - a) * 2 * a / (1 + a**2) ** 2 - 1

    grid = np.linspace(1e-3, total - 1e-3, 4001)
    roots = [brentq(slope, grid[i], grid[i + 1], xtol=1e-14)
             for i in np.flatnonzero(np.sign(slope(grid[:-1])) != np.sign(slope(grid[1:])))]
    expected_bp = sorted(k0_hss(a) for a in roots if 0 <= k0_hss(a) <= stop)

    def fold_eq(s):
        b = (1 + s**2) ** 2 / (2 * s)
        k0 = s / b - s**2 / (1 + s**2)
        a = total - b
        return b * (k0 + a**2 / (1 + a**2)) - a

    sg = np.linspace(0.05, 1.2, 4001)  # b* < T keeps a* > 0 only for s in about (0.2, 1.1)
    vals = fold_eq(sg)
    fold_s = [brentq(fold_eq, sg[i], sg[i + 1], xtol=1e-14)
              for i in np.flatnonzero((np.sign(vals[:-1]) != np.sign(vals[1:])) & (total - (1 + sg[1:] ** 2) ** 2
                                                                                   / (2 * sg[1:]) > 0))]
    expected_fold = sorted(s / ((1 + s**2) ** 2 / (2 * s)) - s**2 / (1 + s**2) for s in fold_s)
    expected_fold = [k for k in expected_fold if 0 <= k <= stop]
    found_bp = [pt.parameter for pt in d.points if pt.kind == "branch"]
    found_fold = [pt.parameter for pt in d.points if pt.kind == "fold" and pt.branch == "local"]
    assert len(expected_bp) == 2 and len(expected_fold) == 1
    np.testing.assert_allclose(found_bp, expected_bp, atol=1e-8)
    np.testing.assert_allclose(found_fold, expected_fold, atol=1e-8)
    assert not [pt for pt in d.points if pt.kind == "fold" and pt.branch == "global"]


@pytest.mark.slow
def test_demo_boundaries_consistent_with_pointwise_regimes(capsys):
    """Each boundary of the demo lies between two sweep points, and in each gap the boundaries chain the
    regimes of its two ends; every gap whose ends differ has one."""
    code = main(["predict", str(CASES / "demo_1d_membrane_switch.toml"), "--json"])
    assert code == 0
    data = json.loads(capsys.readouterr().out)
    values = [p["params"][data["sweep_parameter"]] for p in data["points"]]
    regimes = [p["regime"] for p in data["points"]]
    bounds = data["boundaries"]
    assert bounds
    for k in range(len(values) - 1):
        inside = sorted((b for b in bounds if values[k] < b["value"] <= values[k + 1]), key=lambda b: b["value"])
        chain = [regimes[k]]
        for b in inside:
            assert b["between"][0] == chain[-1]
            assert b["between"][1] != b["between"][0]
            chain.append(b["between"][1])
        assert chain[-1] == regimes[k + 1], (values[k], chain, regimes[k + 1])
    assert {b["kind"] for b in bounds} <= {"fold", "hopf", "branch", "cycle-fold", "regime"}
    assert all(b["kind"] != "regime" for b in bounds)  # every change here is explained by a special point


def test_demo_threshold_continuous_along_unstable_branch():
    """The route-1 threshold along the continued unstable local branch matches predict's at the sweep points
    and falls to zero at the branch point where that branch meets the HSS."""
    case = load_case(CASES / "demo_1d_membrane_switch.toml")
    model = build_model(case)
    points = predict_case(case, model)
    d = predict_diagram(case, model, points)
    curves = threshold_curves(d, np.array([1.0]), 1)
    checked = 0
    for p in points:
        if p.regime != "pulse-triggered":
            continue
        hits = [np.interp(p.value, c.parameter[np.argsort(c.parameter)], c.height[np.argsort(c.parameter)])
                for c in curves if c.parameter.min() <= p.value <= c.parameter.max()
                and np.all(np.diff(c.parameter) > 0) | np.all(np.diff(c.parameter) < 0)]
        positive = [h for h in hits if h > 0]
        assert positive, p.value
        assert min(positive) == pytest.approx(p.threshold, rel=2e-3)
        checked += 1
    assert checked >= 3
    bp = next(pt for pt in d.points if pt.kind == "branch")
    ends = [abs(c.height[np.argmin(np.abs(c.parameter - bp.parameter))]) for c in curves]
    assert min(ends) < 1e-2


def _stuart_landau(omega: float):
    """x' = mu x - omega y - r^2 x, y' = omega x + mu y - r^2 y (the Hopf normal form in polar radius)."""

    def rhs(x, mu):
        r2 = x[0] ** 2 + x[1] ** 2
        return np.array([mu * x[0] - omega * x[1] - r2 * x[0], omega * x[0] + mu * x[1] - r2 * x[1]])

    def jac(x, mu):
        a, b = x
        return np.array([[mu - 3 * a**2 - b**2, -omega - 2 * a * b], [omega - 2 * a * b, mu - a**2 - 3 * b**2]])

    return VectorField(rhs, jac, lambda x, mu: x.copy(), np.zeros((0, 2)))


def test_stuart_landau_cycle_radius_period_multiplier():
    """Stuart-Landau orbits have radius sqrt(mu), period 2 pi / omega and nontrivial Floquet multiplier
    exp(-2 mu T) (common practice / from memory); they are stable and have no fold."""
    omega = 2.0
    fam = cycles_from_hopf(_stuart_landau(omega), None, np.zeros(2), 0.0, omega, (-0.5, 1.0))
    assert fam is not None and fam.parameter.max() > 0.9
    mu = fam.parameter
    np.testing.assert_allclose(np.hypot(fam.start[:, 0], fam.start[:, 1]), np.sqrt(mu), rtol=1e-6, atol=1e-8)
    np.testing.assert_allclose(fam.maxima[:, 0], np.sqrt(mu), rtol=1e-6, atol=1e-8)
    np.testing.assert_allclose(fam.minima[:, 1], -np.sqrt(mu), rtol=1e-6, atol=1e-8)
    np.testing.assert_allclose(fam.period, 2 * np.pi / omega, rtol=1e-8)
    np.testing.assert_allclose(fam.multipliers[:, 0], np.exp(-2 * mu * fam.period), rtol=1e-6, atol=1e-9)
    assert fam.stable.all() and fam.folds == ()


@pytest.mark.slow
def test_subcritical_hopf_cycle_fold():
    """r' = mu r + 2 r^3 - r^5 (angle' = omega) has a subcritical Hopf at mu = 0 whose unstable orbits
    (r^2 = 1 - sqrt(1 + mu)) fold at mu = -1, r = 1 onto stable ones (algebra on the generalised Hopf normal
    form; common practice)."""
    omega = 1.0

    def rhs(x, mu):
        r2 = x[0] ** 2 + x[1] ** 2
        c = mu + 2 * r2 - r2**2
        return np.array([c * x[0] - omega * x[1], omega * x[0] + c * x[1]])

    def jac(x, mu):
        r2 = x[0] ** 2 + x[1] ** 2
        c, dc = mu + 2 * r2 - r2**2, 2 - 2 * r2
        a, b = x
        return np.array([[c + 2 * a * a * dc, -omega + 2 * a * b * dc], [omega + 2 * a * b * dc, c + 2 * b * b * dc]])

    fam = cycles_from_hopf(VectorField(rhs, jac, lambda x, mu: x.copy(), np.zeros((0, 2))), None, np.zeros(2),
                           0.0, omega, (-1.5, 0.5), max_steps=60)
    assert fam is not None
    assert len(fam.folds) == 1 and fam.folds[0] == pytest.approx(-1.0, abs=1e-7)
    r2 = fam.start[:, 0] ** 2 + fam.start[:, 1] ** 2
    np.testing.assert_allclose(fam.parameter + 2 * r2 - r2**2, 0.0, atol=1e-8)
    inner = r2 < 0.9
    assert not fam.stable[inner].any() and fam.stable[r2 > 1.1].all()


def test_linear_boundary_meets_spike_boundary_as_ratio_vanishes():
    """Approaching the demo's spike branch point at s ~ 0.582 from the spike-unstable (well-mixed-stable) side,
    the critical diffusion ratio falls to 0; beyond it there is none (DESIGN.md: in the limit D_slow -> 0 the
    linear and spike instabilities coincide)."""
    case = load_case(CASES / "demo_1d_membrane_switch.toml")
    model = build_model(case)
    points = predict_case(case, model)
    d = predict_diagram(case, model, points)
    bp = max((pt for pt in d.points if pt.kind == "branch"), key=lambda pt: pt.parameter)
    family = lambda p: model.kinetics({**case.parameters, "s": p}, "s")  # noqa: E731
    ratios = {}
    for delta in (-1e-2, -1e-3, 1e-3):
        p = bp.parameter + delta
        eq = baseline_hss(family(p), hss_near(d, p, bp.state))
        ratios[delta] = critical_ratio(family(p), eq.state)
    assert ratios[1e-3] is None
    assert 0 < ratios[-1e-3] < 0.05 * ratios[-1e-2]
    p, curve = critical_ratio_curve(family, d.branches[0])
    assert np.all(np.isnan(curve[(p > bp.parameter) & (p < 0.7)]))


def _brusselator_membrane(p: float, a: float = 1.5) -> Kinetics:
    """Two slow species u, v with Brusselator kinetics (b = p) and a decoupled fast species w' = 1 - w."""

    def reaction(x):
        u, v, w = x
        return np.array([a - (p + 1) * u + u**2 * v, p * u - u**2 * v, 1 - w])

    def jacobian(x):
        u, v, w = x
        z = np.zeros_like(u)
        return np.array([[-(p + 1) + 2 * u * v, u**2, z], [p - 2 * u * v, -(u**2), z], [z, z, -np.ones_like(u)]])

    def dparam(x):
        u, v, w = x
        return np.array([-u, u, np.zeros_like(u)])

    return Kinetics(species=("u", "v", "w"), diffusion=np.array([0.01, 0.01, 1.0]), slow=np.array([True, True, False]),
                    conservation=np.zeros((0, 3)), reaction=reaction, jacobian=jacobian, dparam=dparam)


def test_local_hopf_and_local_orbits():
    """With the Brusselator as the local dynamics of two slow species, the local block has its Hopf point at
    b = 1 + a^2 with frequency a (Prigogine & Lefever 1968; common practice), and the local orbits born there
    are stable (supercritical) with period near 2 pi / a."""
    a = 1.5
    values = np.linspace(2.5, 4.0, 4)
    hss = [np.array([a, b / a, 1.0]) for b in values]
    d = reduced_diagram(_brusselator_membrane, "b", values, hss, [[] for _ in values])
    hopf = [pt for pt in d.points if pt.kind == "hopf" and pt.branch == "local"]
    assert len(hopf) == 1
    assert hopf[0].parameter == pytest.approx(1 + a**2, abs=1e-8)
    assert hopf[0].frequency == pytest.approx(a, rel=1e-7)
    fams = diagram_cycles(_brusselator_membrane, d, (2.5, 4.0), branches=("local",), max_steps=6)
    assert len(fams) == 1 and fams[0].branch == "local"
    fam = fams[0]
    assert fam.period[0] == pytest.approx(2 * np.pi / a, rel=1e-4)
    assert np.all(fam.parameter >= 1 + a**2 - 1e-9) and fam.stable.all()


@pytest.mark.slow
def test_predict_plot_writes_both_figures(tmp_path):
    """`plot_prediction` writes the diagram and its `_plane` twin (Brusselator case: no orbits in range)."""
    case = load_case(CASES / "ref_1d_brusselator.toml")
    model = build_model(case)
    points = predict_case(case, model)
    out = tmp_path / "diagram.png"
    plot_prediction(case, model, points, str(out))
    assert out.stat().st_size > 0 and Path(plane_path(str(out))).stat().st_size > 0


@pytest.mark.slow
def test_demo_boundaries_do_not_depend_on_the_sweep_grid():
    """A coarse, descending sweep of the demo finds the same boundaries (to 1e-8) as the case's own sweep,
    with `between` in the sweep's order: the boundaries come from the branches, not from the grid."""
    from harness.predict import predict_boundaries

    fine_case = load_case(CASES / "demo_1d_membrane_switch.toml")
    coarse_case = load_case(CASES / "demo_1d_membrane_switch.toml", ["sweep.values=[0.7, 0.5, 0.3, 0.25, 0.1]"])
    model = build_model(fine_case)
    fine = predict_boundaries(fine_case, model, predict_case(fine_case, model))
    coarse = predict_boundaries(coarse_case, model, predict_case(coarse_case, model))
    assert len(fine) == len(coarse) == 3
    np.testing.assert_allclose(sorted(b.value for b in coarse), [b.value for b in fine], atol=1e-8)
    assert [tuple(b.between[::-1]) for b in coarse[::-1]] == [tuple(b.between) for b in fine]
