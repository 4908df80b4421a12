"""Every shipped case: `predict` pins one reference number; `simulate` runs in 1D, on a rectangle and on a disk."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest

from harness.cli import main
from solvers.classify import OUTCOMES

CASES = Path(__file__).resolve().parents[2] / "cases"


def _predict(capsys, name: str, *sets: str) -> dict:
    argv = ["predict", str(CASES / name), "--json"]
    for s in sets:
        argv += ["--set", s]
    assert main(argv) == 0
    return json.loads(capsys.readouterr().out)["points"][0]


def test_brusselator_hss(capsys):
    """HSS (a, b/a) (Prigogine & Lefever 1968)."""
    p = _predict(capsys, "ref_1d_brusselator.toml", "b=3.5")
    assert p["hss"]["u"] == pytest.approx(2.0, rel=1e-12) and p["hss"]["v"] == pytest.approx(1.75, rel=1e-12)


def test_schnakenberg_hss(capsys):
    """HSS u* = a + b, v* = b/(a + b)^2 (Schnakenberg 1979; Murray 2003)."""
    p = _predict(capsys, "ref_1d_schnakenberg.toml", "b=0.9")
    assert p["hss"]["u"] == pytest.approx(1.0, rel=1e-12) and p["hss"]["v"] == pytest.approx(0.9, rel=1e-12)


def test_wave_pinning_hss(capsys):
    """With b = T - a the HSS solves -(k0 + 2) a^3 + T (k0 + 1) a^2 - (k0 + 1) a + T k0 = 0 (derived from
    f = b (k0 + a^2/(1 + a^2)) - a with gamma = K = delta = 1; Mori et al. 2008 parameters, from memory)."""
    k0, total = 0.067, 0.2683 + 2.0
    roots = np.roots([-(k0 + 2), total * (k0 + 1), -(k0 + 1), total * k0])
    real = sorted(r.real for r in roots if abs(r.imag) < 1e-12 and r.real > 0)
    p = _predict(capsys, "ref_1d_wave_pinning.toml", f"k0={k0}")
    assert min(abs(p["hss"]["a"] - r) for r in real) < 1e-10
    assert p["hss"]["a"] + p["hss"]["b"] == pytest.approx(total, rel=1e-12)


def test_two_membrane_hss(capsys):
    """The cytosol balances the membrane's inactive form, c = (k_out / k_on) m, and a + m + c keeps its total
    (derived from the model's third equation and its conservation law)."""
    p = _predict(capsys, "ref_1d_two_membrane.toml", "k_f=3.0")
    h = p["hss"]
    assert h["c"] == pytest.approx(0.5 * h["m"], rel=1e-10)
    assert h["a"] + h["m"] + h["c"] == pytest.approx(1.1, rel=1e-12)


CASE_POINTS = {
    "demo_1d_membrane_switch.toml": "s=0.3",
    "ref_1d_brusselator.toml": "b=2.5",
    "ref_1d_schnakenberg.toml": "b=0.9",
    "ref_1d_wave_pinning.toml": "k0=0.067",
    "ref_1d_two_membrane.toml": "k_f=3.0",
}


@pytest.mark.slow
@pytest.mark.parametrize("name", sorted(CASE_POINTS))
@pytest.mark.parametrize("geometry", ["1d", "rectangle", "disk"])
def test_simulate_every_case_every_geometry(capsys, name, geometry):
    """`simulate` runs on each shipped case in 1D, on a rectangle and on a disk and gives a named outcome;
    conserved totals stay put."""
    argv = ["simulate", str(CASES / name), "--set", CASE_POINTS[name], "--start", "noise:1e-3", "--json",
            "--set", "solver.t_end=50", "--set", "solver.cells_1d=64", "--set", "solver.cells_2d=16"]
    if geometry != "1d":
        argv += ["--dim", "2"]
    if geometry == "disk":
        argv += ["--set", "domain.shape=disk", "--set", "domain.radius=3"]
    assert main(argv) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["outcome"] in OUTCOMES
    assert out["domain"]["shape"] == {"1d": "interval", "rectangle": "rectangle", "disk": "disk"}[geometry]
    if out["mass_drift"] is not None:
        assert out["mass_drift"] < 1e-9
