"""Outcome classification and pattern features on synthetic final states and histories."""

from __future__ import annotations

import json

import numpy as np
import pytest
import scipy.sparse as sp

from solvers.classify import OUTCOMES, Outcome, Tolerances, classify, pattern_features
from solvers.fem import disk_p1, interval_p1
from solvers.grids import interval_fv, rectangle_fv
from solvers.records import Discretisation, History, probe_nodes

L = 10.0
BASE = np.array([1.0, 2.0])


def _steady(u: np.ndarray, rows: int = 20, rate: float = 1e-9) -> History:
    """A history that sat at ``u`` for ``rows`` rows with a constant rate."""
    t = np.linspace(0.0, 100.0, rows)
    one = np.ones((rows, 1))
    return History(t, one * u.mean(axis=1), one * u.min(axis=1), one * u.max(axis=1), np.full(rows, rate))


def _two_species(v: np.ndarray) -> np.ndarray:
    """State ``(2, m)``: the pattern ``v`` in species 0, the baseline value in species 1."""
    return np.vstack([v, np.full_like(v, BASE[1])])


def _history_of(disc: Discretisation, t: np.ndarray, state, rate_of) -> History:
    """History rows (weighted mean, min, max, relative L2 rate) of an analytic one-species solution."""
    w = disc.weights
    us = np.array([state(s) for s in t])
    dus = np.array([rate_of(s) for s in t])
    rate = np.sqrt(dus**2 @ w) / np.sqrt(us**2 @ w)
    return History(t, (us @ w / w.sum())[:, None], us.min(axis=1)[:, None], us.max(axis=1)[:, None], rate)


def _uniform_oscillation(t: np.ndarray, period: float, spread: float = 0.0) -> History:
    """Uniform-in-space state whose mean is ``1 + 0.3 sin(2 pi t / period)``; range ``spread``."""
    mean = 1.0 + 0.3 * np.sin(2 * np.pi * t / period)
    lo, hi = mean - spread / 2, mean + spread / 2
    rate = np.abs(0.3 * 2 * np.pi / period * np.cos(2 * np.pi * t / period)) / mean
    return History(t, mean[:, None], lo[:, None], hi[:, None], rate)


def _p1_square(refine: int = 4) -> Discretisation:
    """P1 elements on the unit square (scikit-fem), lumped mass; node graph from the Laplacian."""
    from skfem import Basis, ElementTriP1, MeshTri

    from solvers.fem import laplace, mass

    mesh = MeshTri.init_sqsymmetric().refined(refine)
    basis = Basis(mesh, ElementTriP1())

    weights = np.asarray(mass.assemble(basis).sum(axis=1)).ravel()
    return Discretisation(
        coords=mesh.p.T.copy(),
        weights=weights,
        stiffness=laplace.assemble(basis),
        mass=sp.diags(weights, format="csr"),
        lumped=True,
        shape="rectangle",
        size=(1.0, 1.0),
        method="p1",
    )


# ------------------------------------------------------------------------------------------------------
# settled final states, 1D


def test_uniform_baseline():
    """A settled state equal to the baseline up to noise far below the tolerance is `baseline`."""
    disc = interval_fv(L, 50)
    u = BASE[:, None] + 1e-9 * np.cos(np.pi * disc.coords[:, 0] / L)
    out = classify(disc, u, _steady(u), BASE, "settled")
    assert out.outcome == "baseline", out.reason
    assert out.features is None and out.period is None


def test_uniform_other_state():
    """A settled uniform state away from the baseline is `other-uniform`."""
    disc = interval_fv(L, 50)
    u = np.array([[3.0], [0.5]]) * np.ones(disc.m)
    out = classify(disc, u, _steady(u), BASE, "settled")
    assert out.outcome == "other-uniform", out.reason


def test_baseline_distance_is_relative_to_scale():
    """A uniform offset of half the baseline tolerance is `baseline`; twice the tolerance is not."""
    disc = interval_fv(L, 20)
    tol = Tolerances(baseline_rel=1e-3, baseline_abs=0.0)
    near = (BASE * (1 + 0.5e-3))[:, None] * np.ones(disc.m)
    far = (BASE * (1 + 2e-3))[:, None] * np.ones(disc.m)
    assert classify(disc, near, _steady(near), BASE, "settled", tol).outcome == "baseline"
    assert classify(disc, far, _steady(far), BASE, "settled", tol).outcome == "other-uniform"


def test_edge_plateau_is_one_edge_region():
    """A plateau pinned to x = 0 over a quarter of the domain: one edge region, length L/4, wavelength 2L."""
    disc = interval_fv(L, 200)
    x = disc.coords[:, 0]
    u = _two_species(1.0 + np.tanh((L / 4 - x) / 0.1))
    out = classify(disc, u, _steady(u), BASE, "settled")
    assert out.outcome == "stationary-pattern", out.reason
    f = out.features
    assert f.species == 0 and f.regions == 1 and f.location == "edge"
    # closed form: high where x < L/4 (midpoint at the tanh's centre), to one cell
    assert abs(f.areas[0] - L / 4) <= L / 200
    assert f.area_fraction == pytest.approx(0.25, abs=1 / 200)
    assert f.wavelength == pytest.approx(2 * L)
    assert f.amplitude == pytest.approx(2.0, rel=1e-6)


def test_cosine_three_half_waves():
    """cos(3 pi x / L): one edge and one interior region; wavelength 2L/3 by count and by cosine transform."""
    disc = interval_fv(L, 240)
    x = disc.coords[:, 0]
    f = pattern_features(disc, _two_species(2.0 + np.cos(3 * np.pi * x / L)))
    # closed form: cos(3 pi x/L) > 0 on [0, L/6) and (L/2, 5L/6); the wavelength of cos(k x) is 2 pi / k
    assert f.regions == 2 and f.location == "both"
    assert f.areas == pytest.approx((L / 3, L / 6), abs=L / 240)
    assert f.wavelength == pytest.approx(2 * L / 3)
    assert f.spectral_wavelength == pytest.approx(2 * L / 3)


def test_cosine_three_interior_peaks():
    """-cos(6 pi x / L): three interior peaks (at L/6, L/2, 5L/6) of length L/6 each; wavelength L/3."""
    disc = interval_fv(L, 240)
    x = disc.coords[:, 0]
    f = pattern_features(disc, _two_species(2.0 - np.cos(6 * np.pi * x / L)))
    # closed form: -cos(6 pi x/L) > 0 on (L/12, 3L/12), (5L/12, 7L/12), (9L/12, 11L/12)
    assert f.regions == 3 and f.location == "interior"
    assert f.areas == pytest.approx((L / 6,) * 3, abs=L / 240)
    assert f.wavelength == pytest.approx(L / 3)
    assert f.spectral_wavelength == pytest.approx(L / 3)


def test_two_interior_regions():
    """Two separated bumps give two interior regions whose lengths are the bumps' widths at half height."""
    disc = interval_fv(L, 400)
    x = disc.coords[:, 0]
    sigma = 0.4
    v = 1.0 + np.exp(-((x - 3.0) ** 2) / (2 * sigma**2)) + np.exp(-((x - 7.0) ** 2) / (2 * sigma**2))
    f = pattern_features(disc, _two_species(v))
    # closed form: a Gaussian's full width at half maximum is 2 sqrt(2 ln 2) sigma
    fwhm = 2 * np.sqrt(2 * np.log(2)) * sigma
    assert f.regions == 2 and f.location == "interior"
    assert f.areas == pytest.approx((fwhm, fwhm), abs=2 * L / 400)


def test_species_with_largest_relative_range_is_described():
    """By default the species with the largest relative range is described; `species` picks another."""
    disc = interval_fv(L, 100)
    x = disc.coords[:, 0]
    u = np.vstack([10.0 + 0.1 * np.cos(np.pi * x / L), 1.0 + 0.5 * np.cos(2 * np.pi * x / L)])
    assert pattern_features(disc, u).species == 1
    assert pattern_features(disc, u, species=0).regions == 1
    with pytest.raises(ValueError, match="`species` must be an index"):
        pattern_features(disc, u, species=2)


def test_features_to_dict_is_plain_json():
    """`to_dict` gives plain Python numbers and lists that `json` accepts, for features and outcomes."""
    disc = interval_fv(L, 100)
    u = _two_species(2.0 + np.cos(3 * np.pi * disc.coords[:, 0] / L))
    out = classify(disc, u, _steady(u), BASE, "settled")
    d = json.loads(json.dumps(out.to_dict()))
    assert d["outcome"] == "stationary-pattern" and d["period"] is None
    assert d["features"]["regions"] == 2 and isinstance(d["features"]["areas"], list)
    assert all(type(v) in (int, float, str, list, type(None)) for v in out.features.to_dict().values())


# ------------------------------------------------------------------------------------------------------
# 2D final states


def _gauss2(x: np.ndarray, centre: tuple[float, float], sigma: float) -> np.ndarray:
    """A unit Gaussian bump in 2D."""
    return np.exp(-((x[:, 0] - centre[0]) ** 2 + (x[:, 1] - centre[1]) ** 2) / (2 * sigma**2))


def test_one_blob_on_rectangle():
    """One Gaussian blob: one interior region of area pi * 2 ln2 sigma^2 (the disc above half height)."""
    disc = rectangle_fv(4.0, 3.0, 80, 60)
    sigma = 0.4
    f = pattern_features(disc, _two_species(1.0 + _gauss2(disc.coords, (2.0, 1.5), sigma)))
    area = np.pi * 2 * np.log(2) * sigma**2  # closed form: radius at half height sqrt(2 ln 2) sigma
    assert f.regions == 1 and f.location == "interior"
    assert f.areas[0] == pytest.approx(area, rel=0.05)
    assert f.area_fraction == pytest.approx(area / 12.0, rel=0.05)
    assert f.wavelength is None


def test_two_blobs_on_rectangle():
    """Two equal blobs: two interior regions of equal area."""
    disc = rectangle_fv(4.0, 2.0, 80, 40)
    x = disc.coords
    v = 1.0 + _gauss2(x, (1.0, 1.0), 0.3) + _gauss2(x, (3.0, 1.0), 0.3)
    f = pattern_features(disc, _two_species(v))
    assert f.regions == 2 and f.location == "interior"
    assert f.areas[0] == pytest.approx(f.areas[1], rel=1e-9)
    assert f.areas[0] == pytest.approx(np.pi * 2 * np.log(2) * 0.09, rel=0.05)


def test_half_plane_pattern():
    """A front across the middle: one edge region over half the area; dominant cosine mode k = pi / Lx."""
    disc = rectangle_fv(4.0, 2.0, 40, 20)
    v = 1.0 + np.tanh((2.0 - disc.coords[:, 0]) / 0.3)
    out = classify(disc, _two_species(v), _steady(_two_species(v)), BASE, "settled")
    f = out.features
    assert out.outcome == "stationary-pattern"
    assert f.regions == 1 and f.location == "edge"
    assert f.area_fraction == pytest.approx(0.5)
    # closed form: a front odd about x = Lx/2 projects mostly on cos(pi x / Lx), wavelength 2 Lx
    assert f.spectral_wavelength == pytest.approx(8.0)


def test_p1_node_graph_two_blobs():
    """On a scikit-fem P1 mesh the node graph from the Laplacian's sparsity separates two blobs."""
    disc = _p1_square()
    x = disc.coords
    v = 1.0 + _gauss2(x, (0.3, 0.5), 0.08) + _gauss2(x, (0.7, 0.5), 0.08)
    f = pattern_features(disc, _two_species(v))
    area = np.pi * 2 * np.log(2) * 0.08**2
    assert f.regions == 2 and f.location == "interior"
    assert f.areas == pytest.approx((area, area), rel=0.15)
    assert f.spectral_wavelength is None
    # a bridge of high values joins them into one region
    bridge = (np.abs(x[:, 1] - 0.5) < 0.05) & (x[:, 0] > 0.3) & (x[:, 0] < 0.7)
    assert pattern_features(disc, _two_species(np.where(bridge, 2.0, v))).regions == 1


def test_p1_edge_region():
    """On the P1 mesh a blob in a corner touches the boundary."""
    disc = _p1_square()
    f = pattern_features(disc, _two_species(1.0 + _gauss2(disc.coords, (0.0, 0.0), 0.2)))
    assert f.regions == 1 and f.location == "edge"


def test_p1_interval_matches_fv():
    """The cosine cos(3 pi x / L) on P1 nodes gives the same regions and wavelength as on FV cells."""
    disc = interval_p1(L, 240)
    f = pattern_features(disc, _two_species(2.0 + np.cos(3 * np.pi * disc.coords[:, 0] / L)))
    # closed form as in test_cosine_three_half_waves
    assert f.regions == 2 and f.location == "both"
    assert f.wavelength == pytest.approx(2 * L / 3)
    assert f.areas == pytest.approx((L / 3, L / 6), abs=2 * L / 240)
    assert f.spectral_wavelength is None


def test_p1_disk_centre_and_edge_blobs():
    """On the P1 disk a centred blob is interior (area 2 pi ln2 sigma^2); a blob on the rim is at the edge."""
    disc = disk_p1(1.0, refine=5)
    sigma = 0.15
    centre = pattern_features(disc, _two_species(1.0 + _gauss2(disc.coords, (0.0, 0.0), sigma)))
    assert centre.regions == 1 and centre.location == "interior"
    assert centre.areas[0] == pytest.approx(2 * np.pi * np.log(2) * sigma**2, rel=0.1)
    rim = pattern_features(disc, _two_species(1.0 + _gauss2(disc.coords, (0.0, 1.0), sigma)))
    assert rim.regions == 1 and rim.location == "edge"


# ------------------------------------------------------------------------------------------------------
# histories


def test_decaying_rate_settles():
    """A run that reached the end with the rate decayed far below the threshold is settled."""
    disc = interval_fv(L, 20)
    u = BASE[:, None] * np.ones(disc.m)
    t = np.linspace(0, 50, 200)
    h = _steady(u, rows=200)
    h = History(t, h.mean, h.lo, h.hi, np.exp(-t))
    assert classify(disc, u, h, BASE, "reached-end").outcome == "baseline"
    # the same decay cut short, still above the threshold at the end: no verdict
    short = History(t[:20], h.mean[:20], h.lo[:20], h.hi[:20], h.rate[:20])
    out = classify(disc, u, short, BASE, "reached-end")
    assert out.outcome == "unsettled", out.reason


def test_sine_period_from_irregular_samples(rng):
    """A sinusoidal mean sampled at irregular times: oscillating-uniform, period within 1 %."""
    disc = interval_fv(L, 20)
    period = 7.3
    t = np.sort(rng.uniform(0, 12 * period, 480))
    out = classify(disc, np.ones((1, disc.m)), _uniform_oscillation(t, period), BASE[:1], "reached-end")
    assert out.outcome == "oscillating-uniform", out.reason
    assert out.period == pytest.approx(period, rel=0.01)  # 1 %: the accuracy asked of the classifier


def test_noisy_sine_period(rng):
    """Noise of 5 % of the amplitude does not split cycles (hysteresis): period still within 1 %."""
    disc = interval_fv(L, 20)
    period = 3.0
    t = np.sort(rng.uniform(0, 10 * period, 2000))
    h = _uniform_oscillation(t, period)
    noisy = h.mean + 0.015 * rng.standard_normal(h.mean.shape)
    h = History(t, noisy, noisy, noisy, h.rate)
    out = classify(disc, np.ones((1, disc.m)), h, BASE[:1], "reached-end")
    assert out.outcome == "oscillating-uniform", out.reason
    assert out.period == pytest.approx(period, rel=0.01)


def test_tiny_spatial_noise_does_not_block_oscillation():
    """A uniform oscillation whose spatial range decays inside the uniform band stays oscillating-uniform."""
    disc = interval_fv(L, 20)
    t = np.linspace(0, 40, 800)
    h = _uniform_oscillation(t, 4.0)
    spread = 1e-4 * np.exp(-t / 10.0)[:, None]
    h = History(t, h.mean, h.mean - spread / 2, h.mean + spread / 2, h.rate)
    out = classify(disc, np.ones((1, disc.m)), h, BASE[:1], "reached-end")
    assert out.outcome == "oscillating-uniform", out.reason


def test_oscillating_pattern_is_dynamic():
    """A non-uniform state whose mean oscillates regularly is a dynamic pattern with its period."""
    disc = interval_fv(L, 50)
    t = np.linspace(0, 40, 800)
    u = 1.0 + 0.5 * np.cos(np.pi * disc.coords[:, 0] / L)[None, :]
    out = classify(disc, u, _uniform_oscillation(t, 4.0, spread=1.0), BASE[:1], "reached-end")
    assert out.outcome == "dynamic-pattern", out.reason
    assert out.period == pytest.approx(4.0, rel=0.01)
    assert out.features is not None and out.features.regions == 1


def _standing_wave(disc: Discretisation, t: np.ndarray, period: float, probe: bool) -> History:
    """History of ``1 + 0.5 cos(pi x / L) cos(2 pi t / period)``, with or without values at the probe nodes."""
    x = disc.coords[:, 0]
    us = 1.0 + 0.5 * np.cos(np.pi * x / L)[None, :] * np.cos(2 * np.pi * t / period)[:, None]
    dus = -0.5 * np.cos(np.pi * x / L)[None, :] * (2 * np.pi / period) * np.sin(2 * np.pi * t / period)[:, None]
    w = disc.weights
    rate = np.sqrt(dus**2 @ w) / np.sqrt(us**2 @ w)
    nodes = probe_nodes(disc.coords)
    return History(t, (us @ w / w.sum())[:, None], us.min(axis=1)[:, None], us.max(axis=1)[:, None], rate,
                   us[:, None, nodes] if probe else None)


def test_standing_wave_shows_its_whole_period():
    """Regression (issue 3 note): a standing wave keeps its mean and its range repeats twice per period; the
    values at the probe nodes give the whole period, without them only half shows (exact solution)."""
    disc = interval_fv(L, 60)
    t = np.linspace(0, 40, 1000)
    u = 1.0 + 0.5 * np.cos(np.pi * disc.coords[:, 0] / L)[None, :]
    with_probe = classify(disc, u, _standing_wave(disc, t, 5.0, True), BASE[:1], "reached-end")
    assert with_probe.outcome == "dynamic-pattern", with_probe.reason
    assert with_probe.period == pytest.approx(5.0, rel=0.01)
    without = classify(disc, u, _standing_wave(disc, t, 5.0, False), BASE[:1], "reached-end")
    assert without.period == pytest.approx(2.5, rel=0.01)


def test_probe_nodes_are_spread():
    """Probe nodes: both ends of an interval and one off-centre interior node; three distinct nodes on a disk."""
    disc = interval_fv(L, 40)
    nodes = probe_nodes(disc.coords)
    assert nodes[0] == 0 and nodes[1] == disc.m - 1 and 0 < nodes[2] < disc.m - 1
    assert len(set(probe_nodes(disk_p1(1.0, refine=2).coords))) == 3


@pytest.mark.parametrize("periods", [1.2, 3.0])
def test_one_period_is_not_enough(periods):
    """A sine with about one period (or 1.5) in the window gives no verdict: unsettled, not oscillating."""
    disc = interval_fv(L, 20)
    t = np.linspace(0, periods * 5.0, 400)
    out = classify(disc, np.ones((1, disc.m)), _uniform_oscillation(t, 5.0), BASE[:1], "reached-end")
    assert out.outcome == "unsettled"
    assert "full cycle" in out.reason


def test_coarse_sampling_is_not_enough():
    """Ten cycles seen through about five rows per cycle give no verdict."""
    disc = interval_fv(L, 20)
    t = np.linspace(0, 20 * 2.0, 101) + 0.013
    out = classify(disc, np.ones((1, disc.m)), _uniform_oscillation(t, 2.0), BASE[:1], "reached-end")
    assert out.outcome == "unsettled"
    assert "rows per cycle" in out.reason


def test_damped_oscillation_is_unsettled():
    """An oscillation decaying by 12 % per period is not periodic: unsettled, citing the amplitudes."""
    disc = interval_fv(L, 20)
    t = np.linspace(0, 40, 2000)
    mean = 1.0 + 0.3 * np.exp(-t / 32.0) * np.sin(2 * np.pi * t / 4.0)
    h = History(t, mean[:, None], mean[:, None], mean[:, None], np.full(t.size, 0.1))
    out = classify(disc, np.ones((1, disc.m)), h, BASE[:1], "reached-end")
    assert out.outcome == "unsettled"
    assert "amplitudes" in out.reason


def test_travelling_pulse_is_dynamic():
    """A pulse moving at constant speed (steady range, high rate) is a dynamic pattern."""
    disc = interval_fv(100.0, 400)
    x = disc.coords[:, 0]
    speed, width = 1.0, 2.0

    def state(s: float) -> np.ndarray:
        return 0.1 + np.exp(-(((x - 20.0 - speed * s) / width) ** 2))

    def rate(s: float) -> np.ndarray:
        z = (x - 20.0 - speed * s) / width
        return 2 * z / width * speed * np.exp(-(z**2))

    t = np.linspace(0, 40, 300)
    h = _history_of(disc, t, state, rate)
    out = classify(disc, state(t[-1])[None, :], h, BASE[:1], "reached-end")
    assert out.outcome == "dynamic-pattern", out.reason
    assert out.period is None and out.features.regions == 1 and out.features.location == "interior"
    # the same pattern sitting still with a small rate is no moving pattern
    still = History(h.t, h.mean, h.lo, h.hi, np.full(t.size, 1e-5))
    assert classify(disc, state(t[-1])[None, :], still, BASE[:1], "reached-end").outcome == "unsettled"


def test_huge_steps_with_high_rate_are_not_motion():
    """A steady pattern seen through a few long steps that report a high rate is unsettled, not moving."""
    disc = interval_fv(L, 100)
    u = 1.0 + 0.5 * np.cos(np.pi * disc.coords[:, 0] / L)[None, :]
    t = np.concatenate([np.linspace(0, 10, 20), np.linspace(20, 200, 20)])
    one = np.ones((t.size, 1))
    h = History(t, one * u.mean(), one * u.min(), one * u.max(), np.full(t.size, 0.05))
    out = classify(disc, u, h, BASE[:1], "reached-end")
    assert out.outcome == "unsettled"
    assert "too long" in out.reason


def test_non_finite_and_diverged():
    """A non-finite state, a state beyond the bound or the stepper's divergence give `diverged`."""
    disc = interval_fv(L, 20)
    u = np.ones((2, disc.m))
    h = _steady(u)
    bad = u.copy()
    bad[0, 3] = np.nan
    assert classify(disc, bad, h, BASE, "reached-end").outcome == "diverged"
    assert classify(disc, u, h, BASE, "diverged").outcome == "diverged"
    assert classify(disc, 1e9 * u, h, BASE, "settled", Tolerances(bound=1e6)).outcome == "diverged"
    assert classify(disc, u, h, BASE, "failed").outcome == "unsettled"


def test_bad_inputs_raise():
    """Unknown status, wrong shapes and unknown outcomes raise ValueError naming the argument."""
    disc = interval_fv(L, 20)
    u = np.ones((2, disc.m))
    with pytest.raises(ValueError, match="`status` must be one of"):
        classify(disc, u, _steady(u), BASE, "done")
    with pytest.raises(ValueError, match="`u_final` must have shape"):
        classify(disc, u[:, :-1], _steady(u), BASE, "settled")
    with pytest.raises(ValueError, match="`baseline` must have shape"):
        classify(disc, u, _steady(u), BASE[:1], "settled")
    with pytest.raises(ValueError, match="`outcome` must be one of"):
        Outcome("pattern", "no")
    assert len(OUTCOMES) == 7


def test_tolerances_follow_solver():
    """`from_solver` scales the thresholds with rtol/atol and clips the relative ones to [1e-6, 1e-2]."""
    tol = Tolerances.from_solver(1e-5, 1e-9, settle_window=2.0)
    assert tol.uniform_rel == pytest.approx(1e-4) and tol.uniform_abs == pytest.approx(1e-8)
    assert tol.settled_rate == pytest.approx(5e-6) and tol.moving_rate == pytest.approx(5e-4)
    assert tol.settled_window == 2.0
    assert Tolerances.from_solver(1e-8, 1e-9).settled_rate == pytest.approx(1e-6)
    assert Tolerances.from_solver(1e-1, 0.0).uniform_rel == pytest.approx(1e-2)
    assert Tolerances.from_solver(1e-5, 1e-9, window=0.3).window == 0.3
    with pytest.raises(ValueError, match="`window` must lie"):
        Tolerances(window=0.0)
