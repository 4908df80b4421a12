"""Verification of the full-PDE solver against published travelling-front speeds, in 1D."""

from __future__ import annotations

import numpy as np
import pytest

from solvers.grids import interval_fv
from solvers.stepping import integrate

A_BISTABLE = 0.25


def fun_bistable(u):
    """Nagumo (bistable) kinetics u (1 - u)(u - a)."""
    return u * (1 - u) * (u - A_BISTABLE)


def jac_bistable(u):
    """Jacobian of `fun_bistable`."""
    a = A_BISTABLE
    return (-3 * u * u + 2 * (1 + a) * u - a)[:, None, :]


def fun_fisher(u):
    """Fisher-KPP kinetics r u (1 - u) with r = 1."""
    return u * (1 - u)


def jac_fisher(u):
    """Jacobian of `fun_fisher`."""
    return (1 - 2 * u)[:, None, :]


def level_positions(x: np.ndarray, snaps: np.ndarray, level: float) -> np.ndarray:
    """Position where each decreasing profile ``snaps[k]`` first crosses ``level`` (linear interpolation)."""
    out = []
    for u in snaps:
        i = int(np.flatnonzero(u < level)[0])
        out.append(x[i - 1] + (u[i - 1] - level) / (u[i - 1] - u[i]) * (x[i] - x[i - 1]))
    return np.array(out)


def front_speed(disc, diffusion, fun, jac, x0, times, **tols):
    """Speed of the u = 1/2 level set of a front started as a step at ``x0``, by a straight-line fit."""
    x = disc.coords[:, 0]
    u0 = (x < x0).astype(float)[None]
    res = integrate(disc, [diffusion], fun, jac, u0, float(times[-1]), snapshots=times, **tols)
    assert res.status == "reached-end", res.message
    pos = level_positions(x, res.snap_u[:, 0, :], 0.5)
    return np.polyfit(times, pos, 1)[0]


@pytest.mark.parametrize("method", ["rdcheck", "scipy-bdf"])
def test_bistable_front_speed(method):
    """Bistable front speed sqrt(2D)(1/2 - a) (McKean 1970; Murray 2002, Mathematical Biology I, sec. 13.5)."""
    d = 1.0
    disc = interval_fv(100.0, 1000)
    times = np.linspace(30.0, 150.0, 13)
    speed = front_speed(disc, d, fun_bistable, jac_bistable, 20.0, times, method=method, rtol=1e-5, atol=1e-9)
    expect = np.sqrt(2 * d) * (0.5 - A_BISTABLE)
    assert abs(speed - expect) < 0.02 * expect, f"speed {speed:.5f}, expected {expect:.5f}"


def test_fisher_kpp_front_speed():
    """Fisher-KPP front speed tends to 2 sqrt(D r) from below (Fisher 1937; Kolmogorov, Petrovsky & Piskunov 1937).

    From step data the level set moves as ``2 t - (3/2) ln t`` (Bramson 1983, Mem. AMS 285), so the
    fitted speed over ``[t1, t2]`` is ``2 - (3/2) ln(t2 / t1) / (t2 - t1)`` up to ``O(t^-3/2)``: we require
    it within 3% of 2 sqrt(D r), below it (up to the 0.2% that the grid adds to the discrete linear
    speed), and within 1% of that Bramson-corrected value.
    """
    disc = interval_fv(300.0, 1500)
    t1, t2 = 50.0, 120.0
    times = np.linspace(t1, t2, 15)
    speed = front_speed(disc, 1.0, fun_fisher, jac_fisher, 20.0, times, rtol=1e-4, atol=1e-10)
    bramson = 2.0 - 1.5 * np.log(t2 / t1) / (t2 - t1)
    assert abs(speed - 2.0) < 0.03 * 2.0, f"speed {speed:.5f}"
    assert speed < 2.0 * 1.002, f"speed {speed:.5f} is not approaching 2 from below"
    assert abs(speed - bramson) < 0.01 * 2.0, f"speed {speed:.5f}, Bramson-corrected {bramson:.5f}"
