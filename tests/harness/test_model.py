"""The model layer: compiled functions against SymPy, conservation laws, the slow/fast split."""

from __future__ import annotations

from fractions import Fraction
from pathlib import Path

import numpy as np
import pytest

from harness.case import load_case
from harness.errors import CaseError
from harness.model import build_model, split_species

CASES = Path(__file__).resolve().parents[2] / "cases"


def _model(name: str, overrides=()):
    case = load_case(CASES / name, overrides)
    return case, build_model(case)


def test_reaction_and_jacobian_match_finite_differences(rng):
    """The compiled Jacobian agrees with central differences of the compiled reaction (common practice)."""
    case, model = _model("ref_1d_two_membrane.toml")
    kin = model.kinetics(case.points()[3], case.sweep.parameter)
    u = rng.uniform(0.1, 2.0, (3, 5))
    jac = kin.jacobian(u)
    h = 1e-6
    for j in range(3):
        du = np.zeros_like(u)
        du[j] = h
        fd = (kin.reaction(u + du) - kin.reaction(u - du)) / (2 * h)
        np.testing.assert_allclose(jac[:, j, :], fd, rtol=1e-7, atol=1e-9)


def test_sweep_derivative_matches_finite_difference(rng):
    """The derivative in the sweep parameter agrees with a central difference in that parameter."""
    case, model = _model("demo_1d_membrane_switch.toml")
    point = case.points()[10]
    u = rng.uniform(0.1, 2.0, (2, 4))
    h = 1e-6
    up = model.kinetics({**point, "s": point["s"] + h}).reaction(u)
    dn = model.kinetics({**point, "s": point["s"] - h}).reaction(u)
    np.testing.assert_allclose(model.kinetics(point, "s").dparam(u), (up - dn) / (2 * h), rtol=1e-7, atol=1e-9)


def test_brusselator_reaction_values():
    """Compiled Brusselator kinetics at a point equal the closed form (Prigogine & Lefever 1968)."""
    case, model = _model("ref_1d_brusselator.toml")
    kin = model.kinetics({**case.parameters, "a": 2.0, "b": 3.0})
    u, v = 1.5, 0.7
    expected = [2.0 - 4.0 * u + u * u * v, 3.0 * u - u * u * v]
    np.testing.assert_allclose(kin.f([u, v]), expected, rtol=1e-14)


def test_conservation_laws_detected_exactly():
    """Mass-conserved models get their exact rational law; open models get none."""
    _, wave = _model("ref_1d_wave_pinning.toml")
    assert wave.conservation_exact == ((Fraction(1), Fraction(1)),)
    _, three = _model("ref_1d_two_membrane.toml")
    assert three.conservation_exact == ((Fraction(1), Fraction(1), Fraction(1)),)
    _, demo = _model("demo_1d_membrane_switch.toml")
    assert demo.conservation_exact == ()


def test_weighted_conservation_and_none(tmp_path):
    """A weighted law (2 a + c conserved) is found with its rational weights; `conserved = "none"` skips it."""
    text = (CASES / "ref_1d_wave_pinning.toml").read_text()
    text = text.replace('reaction = "-(b*(k0', 'reaction = "-2*(b*(k0')
    path = tmp_path / "weighted.toml"
    path.write_text(text)
    model = build_model(load_case(path))
    row = np.array([float(x) for x in model.conservation_exact[0]])
    np.testing.assert_allclose(row / row[0], [1.0, 0.5])
    path.write_text(text.replace('conserved = "auto"', 'conserved = "none"'))
    assert build_model(load_case(path)).conservation.shape == (0, 2)


def test_split_inferred_and_ambiguous():
    """A single clear gap decides the split; zero counts as slow; ambiguous gaps are refused."""
    slow, reason = split_species("x.toml", ["a", "b", "c"], np.array([0.0, 0.0, 1.0]), [None] * 3)
    assert slow.tolist() == [True, True, False] and "gap" in reason
    slow, _ = split_species("x.toml", ["a", "b", "c"], np.array([0.01, 0.02, 5.0]), [None] * 3)
    assert slow.tolist() == [True, True, False]
    with pytest.raises(CaseError, match="more than one gap"):
        split_species("x.toml", ["a", "b", "c"], np.array([0.0, 0.01, 1.0]), [None] * 3)
    with pytest.raises(CaseError, match="no clear gap"):
        split_species("x.toml", ["a", "b"], np.array([1.0, 5.0]), [None] * 2)
    with pytest.raises(CaseError, match="at least one slow and one fast"):
        split_species("x.toml", ["a", "b"], np.array([1.0, 5.0]), ["slow", "slow"])


def test_diffusion_expression_in_parameters():
    """A diffusion coefficient may be an expression in parameters, evaluated at each point."""
    case, model = _model("ref_1d_schnakenberg.toml", ["d=25"])
    np.testing.assert_allclose(model.diffusion(case.parameters), [1.0, 25.0])
