"""Case files: loading, validation errors, overrides, and the expression whitelist."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

from harness.case import Domain, load_case, parse_case
from harness.errors import CaseError
from harness.expressions import ExpressionError, parse_expression
from harness.model import build_model

CASES = Path(__file__).resolve().parents[2] / "cases"
DEMO = CASES / "demo_1d_membrane_switch.toml"

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib


def _raw(path: Path = DEMO) -> dict:
    return tomllib.loads(path.read_text())


def _write(tmp_path: Path, text: str) -> Path:
    path = tmp_path / "case.toml"
    path.write_text(text)
    return path


@pytest.mark.parametrize("path", sorted(CASES.glob("*.toml")), ids=lambda p: p.name)
def test_every_shipped_case_loads_and_compiles(path):
    """Every shipped case validates and compiles, with a non-empty sweep and a slow/fast split."""
    case = load_case(path)
    model = build_model(case)
    assert len(case.sweep.values) >= 1
    assert model.slow.any() and not model.slow.all()


def test_sweep_grid_and_order():
    """`{ start, stop, num }` gives an inclusive linear grid; species keep file order."""
    case = load_case(DEMO)
    assert case.sweep.values[0] == pytest.approx(0.1)
    assert case.sweep.values[-1] == pytest.approx(0.7)
    assert len(case.sweep.values) == 31
    assert case.species_names == ("a", "c")


def test_set_parameter_and_sweep_collapse():
    """`--set NAME=VALUE` sets a parameter; setting the sweep parameter makes the sweep that one point."""
    case = load_case(DEMO, ["D_a=0.02", "s=0.3"])
    assert case.parameters["D_a"] == 0.02
    assert case.sweep.values == (0.3,)
    assert case.points() == [{**case.parameters, "s": 0.3}]


def test_set_nested_keys():
    """`--set SECTION.KEY=VALUE` reaches nested tables and is validated like the file."""
    case = load_case(DEMO, ["domain.shape=disk", "domain.radius=2", "solver.cells_1d=800",
                            "starts.pulse.width=0.5"])
    assert case.domain == Domain("disk", (2.0,))
    assert case.solver.cells_1d == 800
    assert case.pulse.width == 0.5
    with pytest.raises(CaseError, match=r"`domain.radius`: missing"):
        load_case(DEMO, ["domain.shape=disk"])


def test_domain_for_dim():
    """An interval becomes a square in 2D; a disk becomes its diameter in 1D."""
    assert Domain("interval", (10.0,)).for_dim(2) == Domain("rectangle", (10.0, 10.0))
    assert Domain("disk", (2.0,)).for_dim(1) == Domain("interval", (4.0,))
    assert Domain("rectangle", (3.0, 2.0)).for_dim(1) == Domain("interval", (3.0,))


BAD_EDITS = [
    (lambda r: r.pop("model"), r"`model`: missing"),
    (lambda r: r["parameters"].update(D_a="fast"), r"`parameters.D_a`: expected a finite number"),
    (lambda r: r["species"]["a"].update(reaction="a*zz"), r"`species.a.reaction`: unknown symbol `zz`"),
    (lambda r: r["species"]["a"].update(reaction="__import__('os').system('x')"),
     r"`species.a.reaction`: call of `__import__.* is not allowed"),
    (lambda r: r["species"]["a"].update(diffusion=-1.0), r"`species.a.diffusion`: expected a number >= 0"),
    (lambda r: r["domain"].update(shape="torus"), r"`domain.shape`: expected one of interval, rectangle, disk"),
    (lambda r: r["sweep"].update(parameter="nope"), r"`sweep.parameter`: expected one of the parameters"),
    (lambda r: r["sweep"].update(values={"start": 0, "stop": 1}), r"`sweep.values.num`: missing"),
    (lambda r: r["baseline"]["guess"].update(q=1.0), r"`baseline.guess.q`: not a species"),
    (lambda r: r["baseline"]["guess"].pop("c"), r"`baseline.guess.c`: missing"),
    (lambda r: r["starts"]["pulse"].update(species=["q"]), r"`starts.pulse.species`: 'q' is not a species"),
    (lambda r: r["solver"].update(cells_1d=2.5), r"`solver.cells_1d`: expected an integer >= 4"),
    (lambda r: r["species"]["a"].update(role="medium"), r"`species.a.role`: expected one of slow, fast"),
    (lambda r: r["species"]["a"].update(role="slow"), r"`species.c.role`: give `role` for every species"),
    (lambda r: r["species"]["c"].update(diffusion="D_a"), r"`species.\*.role`: slow/fast split is ambiguous"),
]


@pytest.mark.parametrize(("edit", "match"), BAD_EDITS)
def test_bad_case_names_file_key_and_expectation(edit, match):
    """Each kind of bad case gives one CaseError line naming the file, the key and the expectation."""
    raw = _raw()
    edit(raw)
    with pytest.raises(CaseError, match=match) as info:
        build_model(parse_case(raw, "bad.toml"))
    message = str(info.value)
    assert message.startswith("bad.toml: `")
    assert "\n" not in message


def test_unreadable_and_missing_files(tmp_path):
    """A missing file and unreadable TOML give one-line errors naming the file."""
    with pytest.raises(CaseError, match=r"nope.toml: `\(file\)`: no such file"):
        load_case(tmp_path / "nope.toml")
    with pytest.raises(CaseError, match=r"`\(toml\)`: not valid TOML"):
        load_case(_write(tmp_path, "[model\nname = 1"))


def test_bad_override_values():
    """Overrides are checked: unknown parameters, missing `=`, wrong types."""
    with pytest.raises(CaseError, match=r"`--set zz`: not a parameter"):
        load_case(DEMO, ["zz=1"])
    with pytest.raises(CaseError, match=r"expected NAME=VALUE"):
        load_case(DEMO, ["D_a"])
    with pytest.raises(CaseError, match=r"`--set D_a`: expected a number"):
        load_case(DEMO, ["D_a=abc"])
    with pytest.raises(CaseError, match=r"`solver.t_end`: expected a positive number"):
        load_case(DEMO, ["solver.t_end=-1"])


def test_forbidden_expression_is_never_evaluated(monkeypatch):
    """A forbidden expression is refused before SymPy sees it: the translator is never called."""
    import harness.expressions as ex

    calls = []
    monkeypatch.setattr(ex, "_translate", lambda *a: calls.append(a))
    for text in ["__import__('os').system('touch /tmp/x')", "(lambda: 1)()", "a.__class__", "[a][0]",
                 "a if a else a", "open('f')", "a @ a", "a // 2", "a % 2"]:
        with pytest.raises(ExpressionError):
            ex.parse_expression(text, {"a": 1})
    assert calls == []


def test_expression_functions_and_sympy_result():
    """Allowed functions translate to their SymPy counterparts, evaluated correctly."""
    import sympy as sp

    a = sp.Symbol("a")
    expr = parse_expression("exp(a) + log(a) + sqrt(a) + tanh(a) + sin(a) + cos(a) + abs(-a) + min(a, 1) "
                            "+ max(a, 1) - -a", {"a": a})
    value = float(expr.subs(a, 0.5))
    import math

    expected = (math.exp(0.5) + math.log(0.5) + math.sqrt(0.5) + math.tanh(0.5) + math.sin(0.5)
                + math.cos(0.5) + 0.5 + 0.5 + 1 + 0.5)
    assert value == pytest.approx(expected, rel=1e-14)
    with pytest.raises(ExpressionError, match="too large"):
        parse_expression("9**9**9", {})
