"""Full-PDE runs through the harness, checked against published results and against each other."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from scipy.integrate import quad
from scipy.optimize import brentq

from harness.case import load_case
from harness.model import build_model
from harness.simulate import Start, simulate

CASES = Path(__file__).resolve().parents[2] / "cases"


def _run(name: str, overrides, start: Start, dim: int = 1):
    case = load_case(CASES / name if not Path(name).is_absolute() else name, overrides)
    model = build_model(case)
    return simulate(case, model, case.points()[0], start, dim=dim)


@pytest.mark.parametrize(("b", "expected"), [(2.8, "baseline"), (3.05, "stationary-pattern")])
def test_brusselator_linear_onset_from_noise(b, expected):
    """Noise decays just below and patterns just above b_c = (1 + a sqrt(D_u/D_v))^2 = 2.914 for a = 2,
    D_u = 1, D_v = 8 (Murray 2003, Mathematical Biology II, ch. 2; common practice)."""
    b_c = (1 + 2.0 * np.sqrt(1.0 / 8.0)) ** 2
    assert b < b_c if expected == "baseline" else b > b_c
    sim = _run("ref_1d_brusselator.toml", [f"b={b}", "solver.cells_1d=200", "solver.t_end=2000"],
               Start("noise", 1e-3))
    assert sim.outcome.outcome == expected, sim.outcome.reason


def _wave_pinning_roots(b: float, k0: float = 0.067) -> list[float]:
    def f(a):
        return b * (k0 + a * a / (1 + a * a)) - a

    xs = np.linspace(0.0, 5.0, 20001)
    v = f(xs)
    return [brentq(f, xs[i], xs[i + 1]) for i in np.flatnonzero(np.sign(v[:-1]) != np.sign(v[1:]))]


def _equal_area_level(k0: float = 0.067) -> float:
    """The cytosolic level b* at which int_{a_-}^{a_+} f(a, b*) da = 0 over the outer roots."""

    def area(b):
        r = _wave_pinning_roots(b, k0)
        return quad(lambda a: b * (k0 + a * a / (1 + a * a)) - a, r[0], r[-1])[0]

    return brentq(area, 1.75, 1.85)


@pytest.fixture(scope="module")
def pinned():
    """A polarised wave-pinning state at small D_a (pulse start, finite volumes and P1)."""
    overrides = ["k0=0.067", "D_a=0.01", "solver.cells_1d=400", "solver.t_end=5000"]
    fv = _run("ref_1d_wave_pinning.toml", overrides, Start("pulse", 1.5))
    p1 = _run("ref_1d_wave_pinning.toml", [*overrides, 'solver.method="p1"'], Start("pulse", 1.5))
    return fv, p1


def test_pinned_plateau_obeys_equal_area_rule(pinned):
    """The pinned front's cytosolic level and plateaus satisfy the equal-area rule of wave pinning
    (Mori, Jilkine & Edelstein-Keshet 2008, Biophys. J.), up to O(D_a/D_b) corrections."""
    fv, _ = pinned
    assert fv.outcome.outcome == "stationary-pattern"
    b_star = _equal_area_level()
    a_lo, a_hi = _wave_pinning_roots(b_star)[0], _wave_pinning_roots(b_star)[-1]
    a, b = fv.run.u
    assert b.mean() == pytest.approx(b_star, rel=1e-3)
    assert a.min() == pytest.approx(a_lo, abs=2e-3)
    assert a.max() == pytest.approx(a_hi, abs=3e-3)


def test_finite_volumes_and_elements_agree(pinned):
    """Finite volumes and P1 elements give the same pinned state to discretisation error."""
    fv, p1 = pinned
    a_p1 = np.interp(fv.coords[:, 0], p1.coords[:, 0], p1.run.u[0])
    rel = np.linalg.norm(a_p1 - fv.run.u[0]) / np.linalg.norm(fv.run.u[0])
    assert rel < 1e-3


def test_mass_conserved_to_roundoff_finite_volumes(pinned):
    """The conservative finite-volume scheme keeps the total a + b to round-off over the whole run."""
    fv, _ = pinned
    assert fv.mass_drift < 1e-12


def test_disk_centred_pulse_stays_rotationally_symmetric():
    """A pulse at the centre of a disk gives a spot that depends on the radius only, up to the mesh's
    discretisation error (symmetry; common practice): nodes at equal radius agree to 1e-3 of the amplitude.

    Regression (multigrid species solves): this run stood still at relative rate 0.02 until t_end, unsettled,
    until the split backend also handed over to the exact LU when the state stops moving over a step."""
    sim = _run("demo_1d_membrane_switch.toml", ["s=0.24", 'domain.shape="disk"', "domain.radius=3",
                                                "solver.cells_2d=16", 'starts.pulse.where="centre"',
                                                "starts.pulse.width=0.5"], Start("pulse", 1.5), dim=2)
    assert sim.outcome.outcome == "stationary-pattern"
    a = sim.run.u[0]
    radius = np.round(np.hypot(*sim.coords.T), 9)
    rings, inverse = np.unique(radius, return_inverse=True)
    ring_mean = np.bincount(inverse, a) / np.bincount(inverse)
    deviation = np.abs(a - ring_mean[inverse]).max()
    assert np.ptp(a) > 0.5
    assert deviation < 1e-3 * np.ptp(a)


def test_short_end_time_is_unsettled_and_blow_up_diverges(tmp_path):
    """A too-short t_end gives `unsettled`; a blow-up model u' = u^2 gives `diverged` (never a crash)."""
    sim = _run("ref_1d_wave_pinning.toml", ["k0=0.067", "solver.t_end=1"], Start("pulse", 1.5))
    assert sim.outcome.outcome == "unsettled"
    text = (CASES / "ref_1d_brusselator.toml").read_text()
    text = text.replace('reaction = "a - (b + 1)*u + u**2*v"', 'reaction = "u**2 + 0*a*b"')
    path = tmp_path / "blowup.toml"
    path.write_text(text)
    case = load_case(path, ["b=2"])
    model = build_model(case)
    sim = simulate(case, model, case.points()[0], Start("pulse", 1.0), hss=np.array([0.0, 1.0]))
    assert sim.outcome.outcome == "diverged"


def test_polish_and_stability_of_a_turing_pattern():
    """Above the Brusselator's onset the settled pattern polishes to a tiny residual and is stable, while the
    HSS it grew from is unstable (b = 3.05 > b_c = 2.914; Murray 2003; common practice)."""
    from harness.simulate import _stable

    overrides = ["b=3.05", "solver.cells_1d=200", "solver.t_end=2000", "solver.polish=true", "solver.stability=true"]
    case = load_case(CASES / "ref_1d_brusselator.toml", overrides)
    model = build_model(case)
    sim = simulate(case, model, case.points()[0], Start("noise", 1e-3))
    assert sim.outcome.outcome == "stationary-pattern"
    assert sim.polish["success"] and sim.polish["residual"] < 1e-9
    assert sim.stable is True
    from solvers.fem import make_discretisation

    disc = make_discretisation("interval", case.domain.size, 200)
    hss = np.tile(sim.hss[:, None], (1, disc.m))
    assert _stable(disc, model.kinetics(case.points()[0]), model, hss) is False


def test_transform_backend_settles_at_rest_in_2d():
    """On a uniform 2D grid (the cosine-transform backend's case) a decaying noise start settles on the
    baseline in a few dozen steps: the stepper hands over to the exact LU near rest instead of hovering
    (regression: it once took 4232 steps and never settled)."""
    sim = _run("demo_1d_membrane_switch.toml", ["s=0.16"], Start("noise", 1e-3), dim=2)
    assert sim.run.status == "settled"
    assert sim.outcome.outcome == "baseline"
    assert sim.run.nsteps < 100
