"""Time stepping: exact solutions, observed order, equivalence with scipy's BDF, conservation, statuses."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp

from solvers.fem import disk_p1, interval_p1, rectangle_p1
from solvers.grids import interval_fv, rectangle_fv
from solvers.records import probe_nodes
from solvers.settle import SettleRule, polish, relative_rate
from solvers.stepping import BACKENDS, TABLEAUS, RosenbrockW, StopRun, integrate
from solvers.system import MolSystem

# ---- models: fun_* reaction, jac_* its Jacobian --------------------------------------------------------

K0, GAM = 0.067, 1.0
D_POL = np.array([0.01, 1.0])


def fun_polarity(u):
    """Mass-conserved wave-pinning-like kinetics: f = c (k0 + a^2 / (1 + a^2)) - a, g = -f."""
    a, c = u
    f = c * (K0 + GAM * a * a / (1 + a * a)) - a
    return np.stack([f, -f])


def jac_polarity(u):
    """Jacobian of `fun_polarity`."""
    a, c = u
    fa = c * GAM * 2 * a / (1 + a * a) ** 2 - 1.0
    fc = K0 + GAM * a * a / (1 + a * a)
    return np.array([[fa, fc], [-fa, -fc]])


def fun_zero(u):
    """No reaction (pure diffusion)."""
    return np.zeros_like(u)


def jac_zero(u):
    """Jacobian of `fun_zero`."""
    return np.zeros((u.shape[0], u.shape[0], u.shape[1]))


def fun_square(u):
    """u_t = u^2: blows up at t = 1 / u0."""
    return u * u


def jac_square(u):
    """Jacobian of `fun_square`."""
    return (2 * u)[:, None, :]


def fun_schnak(u):
    """Schnakenberg kinetics f = 0.1 - a + a^2 b, g = 0.9 - a^2 b (a nonlinear, non-conserving test)."""
    a, b = u
    return np.stack([0.1 - a + a * a * b, 0.9 - a * a * b])


def jac_schnak(u):
    """Jacobian of `fun_schnak`."""
    a, b = u
    return np.array([[-1 + 2 * a * b, a * a], [-2 * a * b, -a * a]])


def pulse_start(disc):
    """A pulse of membrane species at the left end over a uniform cytosol."""
    r2 = (disc.coords**2).sum(axis=1)
    return np.stack([0.2 + 2.0 * np.exp(-r2 / 0.5), np.full(disc.m, 2.0)])


def sol_heat_mode(disc, d, k, t):
    """Exact semi-discrete heat solution from cos(k pi x / L) on the FV interval: exp(-D lam t) cos(...).

    The sampled cosine is an eigenvector of the FV Neumann Laplacian with eigenvalue
    (2 - 2 cos(k pi / N)) / dx^2 (common practice).
    """
    (length,), (cells,) = disc.size, disc.grid
    dx = length / cells
    lam = (2 - 2 * np.cos(k * np.pi / cells)) / dx**2
    return np.exp(-d * lam * t) * np.cos(k * np.pi * disc.coords[:, 0] / length)


# ---- exact solutions -------------------------------------------------------------------------------------


@pytest.mark.parametrize(("method", "backend"),
                         [("rdcheck", "lu"), ("rdcheck", "banded"), ("rdcheck", "dct"), ("scipy-bdf", None)])
def test_heat_mode_decay_exact(method, backend):
    """A cosine mode decays as exp(-D lam t) to within a few tolerance units (exact semi-discrete solution)."""
    disc = interval_fv(2.0, 50)
    d, k, rtol, atol = 0.5, 3, 1e-4, 1e-9
    u0 = sol_heat_mode(disc, d, k, 0.0)[None]
    opts = {} if backend is None else {"backend": backend}
    res = integrate(disc, [d], fun_zero, jac_zero, u0, 1.0, method=method, rtol=rtol, atol=atol, **opts)
    exact = sol_heat_mode(disc, d, k, 1.0)
    err = np.max(np.abs(res.u[0] - exact) / (atol + rtol * np.max(np.abs(exact))))
    assert res.status == "reached-end"
    assert err < 20, f"error {err:.3g} tolerance units"


def test_consistent_mass_heat_mode():
    """P1 with consistent mass: the nodal cosine decays with the generalised eigenvalue of (K, M) (common practice)."""
    length, cells, d, k = 2.0, 40, 0.5, 2
    disc = interval_p1(length, cells, lumped=False)
    x = disc.coords[:, 0]
    theta = k * np.pi * (length / cells) / length
    h = length / cells
    lam = (2 - 2 * np.cos(theta)) / h**2 / ((4 + 2 * np.cos(theta)) / 6)
    u0 = np.cos(k * np.pi * x / length)[None]
    res = integrate(disc, [d], fun_zero, jac_zero, u0, 1.0, rtol=1e-5, atol=1e-10)
    exact = np.exp(-d * lam) * u0[0]
    assert np.max(np.abs(res.u[0] - exact)) < 1e-4 * np.max(np.abs(exact))
    with pytest.raises(ValueError, match="lumped"):
        integrate(disc, [d], fun_zero, jac_zero, u0, 1.0, method="scipy-bdf")


# ---- observed order ----------------------------------------------------------------------------------------


@pytest.mark.parametrize("backend", sorted(BACKENDS))
@pytest.mark.parametrize("scheme", sorted(TABLEAUS))
def test_observed_order(scheme, backend):
    """Fixed steps, Jacobian kept over 4 steps: the log-log error slope is the scheme's order for any W.

    ROS2: order 2 (Verwer et al. 1999); ROS34PW2: order 3 (Rang & Angermann 2005).
    """
    disc = interval_fv(5.0, 40)
    system = MolSystem(disc, [0.05, 1.0], fun_schnak, jac_schnak)
    x = disc.coords[:, 0]
    u0 = np.stack([1.0 + 0.3 * np.cos(np.pi * x / 5.0), 0.9 + 0.1 * np.cos(2 * np.pi * x / 5.0)])
    t_end = 1.0
    ref = solve_ivp(system.rhs, (0, t_end), u0.ravel(), method="Radau", rtol=1e-12, atol=1e-13, jac=system.jac)
    steps = np.array([10, 20, 40, 80])
    errs = []
    for nsteps in steps:
        sol = RosenbrockW(system, 0.0, u0.ravel(), t_end, backend=backend, fixed_step=t_end / nsteps,
                          jac_every=4, scheme=scheme)
        while sol.status == "running":
            sol.step()
        errs.append(np.linalg.norm(sol.y - ref.y[:, -1]) / np.linalg.norm(ref.y[:, -1]))
    rate = -np.polyfit(np.log(steps), np.log(errs), 1)[0]
    expect = TABLEAUS[scheme].order
    assert abs(rate - expect) < 0.25, f"observed order {rate:.3f}, expected {expect}, errors {errs}"


# ---- equivalence of two routes -------------------------------------------------------------------------------


def test_ours_matches_scipy_bdf():
    """Our stepper and solve_ivp's BDF agree on the same nonlinear polarity problem at tight tolerance."""
    disc = interval_fv(10.0, 200)
    u0 = pulse_start(disc)
    ours = integrate(disc, D_POL, fun_polarity, jac_polarity, u0, 50.0, rtol=1e-7, atol=1e-10)
    bdf = integrate(disc, D_POL, fun_polarity, jac_polarity, u0, 50.0, method="scipy-bdf", rtol=1e-7,
                    atol=1e-10)
    diff = np.linalg.norm(ours.u - bdf.u) / np.linalg.norm(bdf.u)
    assert diff < 1e-5, f"relative difference {diff:.3g}"
    assert ours.u[0].max() > 1.0  # a pattern formed, so the comparison is not between two flat states


@pytest.mark.parametrize("lumped", [True, False], ids=["lumped", "consistent"])
def test_banded_matches_sparse_lu(lumped):
    """The banded LU and SuperLU solve the same W: equal steps and states on a P1 interval (two routes)."""
    disc = interval_p1(10.0, 120, lumped=lumped)
    u0 = pulse_start(disc)
    runs = [integrate(disc, D_POL, fun_polarity, jac_polarity, u0, 40.0, backend=b) for b in ("banded", "lu")]
    assert runs[0].nsteps == runs[1].nsteps
    assert np.linalg.norm(runs[0].u - runs[1].u) < 1e-10 * np.linalg.norm(runs[1].u)


@pytest.mark.parametrize("coupling", [0.0, 50.0], ids=["no-swaps", "swaps"])
def test_banded_solve_with_and_without_row_swaps(coupling, rng):
    """The banded solve equals a dense solve of W whether the factorisation swapped rows or not (both routes)."""
    disc = interval_fv(2.0, 30)

    def jac(u):
        zero = np.zeros(u.shape[1])
        return np.array([[-1.0 + zero, coupling + zero], [0.5 + zero, -2.0 + zero]])

    system = MolSystem(disc, [0.01, 0.01], lambda u: 0 * u, jac)
    backend = BACKENDS["banded"](system)
    u = np.ones(system.shape)
    backend.update(u, 0.5)
    assert (backend._triangles is None) == (coupling > 0)
    r = rng.standard_normal(system.shape)
    w = np.eye(r.size) - 0.5 * system.mass_jacobian(u).toarray()
    np.testing.assert_allclose(backend.solve(r).ravel(), np.linalg.solve(w, r.ravel()), rtol=1e-11, atol=1e-12)


def test_history_records_the_probe_nodes():
    """Each history row holds every species at the three probe nodes; the last row is the final state there."""
    disc = interval_fv(10.0, 80)
    res = integrate(disc, D_POL, fun_polarity, jac_polarity, pulse_start(disc), 5.0)
    probe = res.history.probe
    assert probe.shape == (res.history.t.size, 2, 3)
    np.testing.assert_array_equal(probe[-1], res.u[:, probe_nodes(disc.coords)])


def test_banded_refuses_a_plane_mesh():
    """The banded backend is for chains of nodes; a rectangle is refused with a message that says so."""
    system = MolSystem(rectangle_fv(1.0, 1.0, 4, 4), D_POL, fun_polarity, jac_polarity)
    with pytest.raises(ValueError, match="`banded` needs a 1D mesh"):
        BACKENDS["banded"](system)



def test_split_species_route_follows_the_mesh():
    """The split backend solves species by multigrid on meshes with a hierarchy (refined disk, halving P1
    rectangle), by SuperLU elsewhere; a multigrid run factorises nothing; an unknown route is refused, naming
    `species`."""
    disk, line = disk_p1(2.0, refine=3), interval_p1(5.0, 40)
    for disc, route in ((disk, "multigrid"), (rectangle_p1(2.0, 2.0, 32, 32), "multigrid"), (line, "superlu"),
                        (rectangle_p1(2.0, 2.0, 31, 32), "superlu")):
        assert BACKENDS["split"](MolSystem(disc, D_POL, fun_polarity, jac_polarity)).species == route
    res = integrate(disk, D_POL, fun_polarity, jac_polarity, pulse_start(disk), 5.0, backend="split")
    assert res.status == "reached-end" and res.nlu == 0
    with pytest.raises(ValueError, match="`species`"):
        BACKENDS["split"](MolSystem(disk, D_POL, fun_polarity, jac_polarity), species="amg")

# ---- conservation ------------------------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("dim", "method", "backend"),
    [(1, "rdcheck", "lu"), (1, "rdcheck", "banded"), (1, "rdcheck", "dct"), (1, "scipy-bdf", None),
     (2, "rdcheck", "dct"), (2, "rdcheck", "lu")],
)
def test_conserved_total_to_roundoff(dim, method, backend):
    """a + c is conserved by the kinetics; the discrete total stays fixed to 1e-10 relative (DESIGN.md)."""
    disc = interval_fv(10.0, 200) if dim == 1 else rectangle_fv(4.0, 3.0, 24, 18)
    u0 = pulse_start(disc)
    opts = {} if backend is None else {"backend": backend}
    res = integrate(disc, D_POL, fun_polarity, jac_polarity, u0, 30.0, method=method, snapshots=7, **opts)
    total0 = disc.weights @ u0.sum(axis=0)
    drift = np.abs(np.einsum("j,kij->k", disc.weights, res.snap_u) - total0) / total0
    assert np.max(drift) < 1e-10
    assert abs(disc.weights @ res.u.sum(axis=0) - total0) < 1e-10 * total0


# ---- settling ----------------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def settled_pattern():
    """The polarity pattern on a 1D interval, run to settling and polished."""
    disc = interval_fv(10.0, 200)
    u0 = pulse_start(disc)
    with np.errstate(all="raise", under="ignore"):
        res = integrate(disc, D_POL, fun_polarity, jac_polarity, u0, 5000.0, settle=SettleRule(1e-6, 50.0))
        pol = polish(disc, D_POL, fun_polarity, jac_polarity, res.u, conserved_rows=np.array([[1.0, 1.0]]))
    return disc, res, pol


def test_settle_rule_fires_on_pattern(settled_pattern):
    """The run settles on a pattern; the rule's batch verdict on the history agrees with the tracker."""
    disc, res, _ = settled_pattern
    assert res.status == "settled", res.message
    assert res.u[0].max() > 3 * res.u[0].min()
    rule = SettleRule(1e-6, 50.0)
    assert rule.settled(res.history.t, res.history.rate, 1e-4)
    assert not rule.settled(res.history.t[:-5], res.history.rate[:-5], 1e-4)


def test_settle_rule_bounds_the_steps(settled_pattern):
    """With a settle rule no step is longer than the window or a tenth of the time reached (regression: a demo
    run leapt from t = 1809 to t_end = 20000 in one step and ended unsettled); without one, steps are free."""
    disc, res, settled = settled_pattern
    t = res.history.t
    assert np.all(np.diff(t) <= np.maximum(50.0, 0.1 * t[:-1]) * (1 + 1e-12))
    assert np.diff(t).max() > 50.0  # the tenth-of-t bound was reached, not only the window
    free = integrate(disc, D_POL, fun_polarity, jac_polarity, settled.u, 1e4)
    assert np.diff(free.history.t).max() > 1e3


def test_polish_converges_and_keeps_total(settled_pattern):
    """Newton polish from a still-moving state (t = 100) reaches the pattern polished from the settled run (to
    1e-9) and keeps the total; the settled run itself is within 1e-4 of it (rate below 1e-6 is not distance)."""
    disc, res, settled = settled_pattern
    early = integrate(disc, D_POL, fun_polarity, jac_polarity, pulse_start(disc), 100.0)
    assert early.history.rate[-1] > 1e-6
    pol = polish(disc, D_POL, fun_polarity, jac_polarity, early.u, conserved_rows=np.array([[1.0, 1.0]]))
    assert pol.success, pol.message
    assert pol.residual < 1e-10 and pol.iterations >= 1
    total = disc.weights @ early.u.sum(axis=0)
    assert abs(disc.weights @ pol.u.sum(axis=0) - total) < 1e-12 * total
    assert np.linalg.norm(pol.u - settled.u) / np.linalg.norm(settled.u) < 1e-9
    assert np.linalg.norm(res.u - settled.u) / np.linalg.norm(settled.u) < 1e-4


def test_polish_reports_far_start():
    """A start far from any steady state is reported, not polished into some other state."""
    disc = interval_fv(10.0, 100)
    u0 = pulse_start(disc)
    pol = polish(disc, D_POL, fun_polarity, jac_polarity, u0, conserved_rows=np.array([[1.0, 1.0]]),
                 max_move=0.01)
    assert not pol.success
    assert "not near a steady state" in pol.message
    np.testing.assert_array_equal(pol.u, u0)


@pytest.mark.parametrize("backend", sorted(BACKENDS))
def test_settled_pattern_stays_settled(settled_pattern, backend):
    """From the polished pattern the steps grow large and the state does not move (large-step stability)."""
    disc, _, pol = settled_pattern
    res = integrate(disc, D_POL, fun_polarity, jac_polarity, pol.u, 1e4, backend=backend)
    change = np.linalg.norm(res.u - pol.u) / np.linalg.norm(pol.u)
    biggest = np.max(np.diff(res.history.t))
    assert res.status == "reached-end"
    assert change < 1e-6, f"relative change {change:.3g}"
    assert biggest > (1e3 if BACKENDS[backend].exact else 5.0), f"largest step {biggest:.3g}"


def test_perturbed_pattern_returns(settled_pattern, rng):
    """A small perturbation of the stable pattern decays again under the adaptive stepper."""
    disc, _, pol = settled_pattern
    noise = 1e-3 * rng.standard_normal(pol.u.shape)
    noise -= (disc.weights @ noise.sum(axis=0)) / disc.weights.sum() / 2  # keep the total
    res = integrate(disc, D_POL, fun_polarity, jac_polarity, pol.u + noise, 2000.0)
    assert np.linalg.norm(res.u - pol.u) / np.linalg.norm(pol.u) < 1e-4


# ---- statuses ----------------------------------------------------------------------------------------


def test_blow_up_diverges():
    """u_t = u^2 from u ~ 1 blows up near t = 1: status diverged, no exception."""
    disc = interval_fv(1.0, 20)
    u0 = (1.0 + 0.1 * np.cos(np.pi * disc.coords[:, 0]))[None]
    for method in ("rdcheck", "scipy-bdf"):
        res = integrate(disc, [0.1], fun_square, jac_square, u0, 3.0, method=method)
        assert res.status == "diverged", (method, res.message)
        assert res.success
        assert res.t_final < 1.0


def test_blow_up_confirmed_by_the_exact_backend():
    """Our stepper reports `diverged` only when a rerun at a tenth of rtol with an exact W diverges too."""
    disc = interval_fv(1.0, 20)
    u0 = (1.0 + 0.1 * np.cos(np.pi * disc.coords[:, 0]))[None]
    res = integrate(disc, [0.1], fun_square, jac_square, u0, 3.0, rtol=1e-3)
    assert res.status == "diverged" and "; confirmed at rtol 0.0001 with the exact `banded` backend" in res.message


def test_loose_tolerance_blow_up_is_not_an_outcome():
    """Regression: at rtol 0.5 the cosine-transform W stepped the polarity problem out of the physical states
    and it diverged; the rerun at rtol 0.05 with the exact LU forms the pattern, and that run is reported
    (observers initialised and finalised once)."""
    disc = rectangle_fv(10.0, 10.0, 24, 24)
    obs = _Recorder(stop_after=10**6)
    res = integrate(disc, D_POL, fun_polarity, jac_polarity, pulse_start(disc), 200.0, rtol=0.5, observers=[obs])
    assert res.status == "reached-end"
    assert "with rtol 0.5" in res.message and "not confirmed at rtol 0.05 with the exact `lu` backend" in res.message
    assert res.u[0].max() > 2 * res.u[0].min()
    kinds = [c[0] for c in obs.calls]
    assert kinds.count("initialize") == 1 and kinds.count("finalize") == 1 and kinds[-1] == "finalize"
    assert obs.calls[-1] == ("finalize", "reached-end")


def test_short_run_reaches_end():
    """A t_end too short to settle gives reached-end, with the history starting at t = 0."""
    disc = interval_fv(10.0, 100)
    res = integrate(disc, D_POL, fun_polarity, jac_polarity, pulse_start(disc), 1.0,
                    settle=SettleRule(1e-6, 20.0))
    assert res.status == "reached-end"
    assert res.t_final == 1.0
    assert res.history.t[0] == 0.0 and res.history.t[-1] == 1.0
    assert res.history.mean.shape == (res.nsteps + 1, 2)
    assert res.nsteps > 0 and res.nfev >= 2 * res.nsteps


class _Recorder:
    """An observer that counts calls and stops the run after a few steps."""

    def __init__(self, stop_after):
        self.calls, self.stop_after = [], stop_after

    def initialize(self, state, info):
        self.calls.append(("initialize", info["t_end"]))

    def handle(self, state, t):
        self.calls.append(("handle", t))
        if len(self.calls) > self.stop_after:
            msg = "enough"
            raise StopRun(msg)

    def finalize(self, info):
        self.calls.append(("finalize", info["status"]))


def test_observer_stops_run():
    """An observer raising StopRun ends the run early with reached-end; all three hooks are called."""
    disc = interval_fv(10.0, 50)
    obs = _Recorder(stop_after=3)
    res = integrate(disc, D_POL, fun_polarity, jac_polarity, pulse_start(disc), 100.0, observers=[obs])
    assert res.status == "reached-end" and "observer" in res.message
    assert [c[0] for c in obs.calls] == ["initialize", "handle", "handle", "handle", "finalize"]
    assert res.nsteps == 3


def test_snapshots_at_requested_times():
    """Snapshots come at the requested times; a settled run appends its final state."""
    disc = interval_fv(10.0, 100)
    u0 = pulse_start(disc)
    res = integrate(disc, D_POL, fun_polarity, jac_polarity, u0, 20.0, snapshots=[0.0, 5.0, 12.5])
    np.testing.assert_array_equal(res.snap_t, [0.0, 5.0, 12.5])
    np.testing.assert_array_equal(res.snap_u[0], u0)
    mid = integrate(disc, D_POL, fun_polarity, jac_polarity, u0, 5.0, rtol=1e-8, atol=1e-11)
    assert np.linalg.norm(res.snap_u[1] - mid.u) / np.linalg.norm(mid.u) < 1e-3
    bump = (1.0 + 0.1 * np.cos(np.pi * disc.coords[:, 0] / 10.0))[None]
    settled = integrate(disc, [1.0], fun_zero, jac_zero, bump, 1e5, snapshots=3, settle=SettleRule(1e-6, 10.0))
    assert settled.status == "settled"
    assert settled.snap_t[-1] == settled.t_final < 1e5


def test_rate_history_is_relative():
    """History rate is rms(du/dt) / rms(u), the same number as relative_rate at the final state."""
    disc = interval_fv(10.0, 50)
    system = MolSystem(disc, D_POL, fun_polarity, jac_polarity)
    res = integrate(disc, D_POL, fun_polarity, jac_polarity, pulse_start(disc), 3.0)
    expect = relative_rate(disc.weights, res.u, system.rate(res.u), 1e-8)
    assert res.history.rate[-1] == pytest.approx(expect, rel=1e-12)


def test_bad_arguments():
    """Unknown methods and backends, and wrong shapes, raise with the argument named."""
    disc = interval_fv(1.0, 10)
    u0 = np.ones((2, disc.m))
    with pytest.raises(ValueError, match="`method`"):
        integrate(disc, D_POL, fun_polarity, jac_polarity, u0, 1.0, method="euler")
    with pytest.raises(ValueError, match="`backend`"):
        integrate(disc, D_POL, fun_polarity, jac_polarity, u0, 1.0, backend="gpu")
    with pytest.raises(ValueError, match="`u0`"):
        integrate(disc, D_POL, fun_polarity, jac_polarity, u0[:1], 1.0)


def test_jacobian_matches_finite_differences(rng):
    """The assembled sparse Jacobian equals a finite-difference Jacobian of rhs, within its pattern."""
    disc = rectangle_fv(2.0, 1.0, 6, 4)
    system = MolSystem(disc, D_POL, fun_polarity, jac_polarity)
    y = 0.5 + rng.random(2 * disc.m)
    jac = system.jac(0.0, y).toarray()
    eps = 1e-7
    fd = np.column_stack([(system.rhs(0, y + eps * e) - system.rhs(0, y - eps * e)) / (2 * eps)
                          for e in np.eye(y.size)])
    np.testing.assert_allclose(jac, fd, atol=1e-6)
    assert np.all(system.jac_sparsity.toarray()[np.abs(fd) > 1e-9] == 1)


def test_settle_rule_needs_window_and_steps():
    """A dip of the rate shorter than the window, or too few steps, does not settle; the tracker agrees."""
    rule = SettleRule(tol=1e-6, window=10.0, min_steps=4)
    t = np.linspace(0.0, 30.0, 61)
    rate = np.where((t > 12.0) & (t < 20.0), 1e-8, 1e-3)  # still for 8 < 10 time units, then moving again
    assert not rule.settled(t, rate, rtol=1e-8)
    still = np.where(t > 12.0, 1e-8, 1e-3)
    assert rule.settled(t, still, rtol=1e-8)
    tracker = rule.tracker(1e-8)
    verdicts = [tracker.update(ti, ri) for ti, ri in zip(t, still, strict=True)]
    first = int(np.argmax(verdicts))
    assert rule.settled(t[: first + 1], still[: first + 1], 1e-8)
    assert not rule.settled(t[:first], still[:first], 1e-8)
    assert not rule.settled([0.0, 100.0], [1e-9, 1e-9], 1e-8)  # two huge steps: too few
    assert rule.threshold(1e-3) == pytest.approx(1e-4)  # rtol / window dominates a tighter tol
    with pytest.raises(ValueError, match="`window`"):
        SettleRule(tol=1e-6, window=0.0)
