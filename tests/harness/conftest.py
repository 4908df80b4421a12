"""Fixtures for the report and compare tests: hand-built studies and run records (fake numbers, exact structure).

The builders are handed out as fixtures (``study_maker``, ``record_maker``, ``study_extras``) so that the tests
need no import of this file, whatever pytest's import mode.
"""

from __future__ import annotations

import copy

import numpy as np
import pytest

from harness.runs import RunRecord, RunTask

SPECIES = ["a", "c"]


def record(key: str, outcome: str, value: float, kind: str, height: float, dim: int) -> RunRecord:
    """A RunRecord with a small final state on a 1D line or a 2D grid of nodes."""
    task = RunTask("cases/x.toml", (), (("k", value),), kind, height, dim, 8 if dim == 1 else 4)
    if dim == 1:
        coords = np.linspace(0.0, 10.0, 9)[:, None]
    else:
        g = np.linspace(0.0, 10.0, 5)
        coords = np.array([(x, y) for y in g for x in g])
    bump = np.exp(-((coords - 5.0) ** 2).sum(axis=1))
    lift = bump if outcome == "stationary-pattern" else np.zeros_like(bump)
    final = np.vstack([1.0 + lift, 2.0 - 0.1 * bump])
    return RunRecord(key=key, task=task, outcome=outcome, reason="fixture", t_final=100.0, mass_drift=None,
                     status="finished", steps=10, wall=0.1, coords=coords, final=final)


def _pred(value: float, regime: str, threshold: float | None, turing: bool, wms: bool = True) -> dict:
    return {"params": {"k": value}, "regime": regime, "threshold": threshold, "turing_unstable": turing,
            "well_mixed_stable": wms}


def make_study(outcomes: dict[tuple[int, int], tuple[str, list[tuple[float, str]]]] | None = None
               ) -> tuple[dict, dict[str, RunRecord]]:
    """A study over `k` with one point per regime, 1D and 2D; ``outcomes[(index, dim)]`` replaces the runs."""
    regimes = [("no-pattern", None, False), ("pulse-triggered", 0.8, False), ("self-patterning", None, True),
               ("self-oscillating", None, False), ("unresolved", None, False)]
    values = [0.5, 0.75, 1.0, 1.25, 1.5]
    default = {
        0: ("baseline", [(1.0, "baseline"), (2.0, "baseline")]),
        1: ("baseline", [(0.5, "baseline"), (1.0, "stationary-pattern"), (2.0, "stationary-pattern")]),
        2: ("stationary-pattern", []),
        3: ("dynamic-pattern", []),
        4: ("other-uniform", [(1.0, "baseline")]),
    }
    records: dict[str, RunRecord] = {}
    points = []
    for i, v in enumerate(values):
        runs, threshold = {}, {}
        for d in (1, 2):
            noise, pulses = (outcomes or {}).get((i, d), default[i])
            nkey = f"n{i}-{d}"
            records[nkey] = record(nkey, noise, v, "noise", 1e-3, d)
            pairs = []
            for j, (h, o) in enumerate(pulses):
                pkey = f"p{i}-{d}-{j}"
                records[pkey] = record(pkey, o, v, "pulse", h, d)
                pairs.append([h, pkey])
            runs[str(d)] = {"noise": nkey, "pulses": pairs}
            low = max((h for h, o in pulses if o == "baseline"), default=None)
            high = min((h for h, o in pulses if o == "stationary-pattern"), default=None)
            status = "not-searched" if not pulses else "bracketed" if low and high else "never-patterned"
            refined = {"resolution": 16, "low": low, "high": high, "held": d == 1} if low and high else None
            threshold[str(d)] = {"low": low, "high": high, "resolution": 8, "refined": refined, "status": status}
        points.append({"index": i, "params": {"k": v}, "value": v, "runs": runs, "threshold": threshold})
    study = {
        "case": "cases/x.toml", "overrides": [], "model": "toy_model", "sweep_parameter": "k", "species": SPECIES,
        "dims": [1, 2], "resolution": {"1": 8, "2": 4}, "tolerance": 0.02,
        "domain": {"1": {"shape": "interval", "size": [10.0]}, "2": {"shape": "rectangle", "size": [10.0, 10.0]}},
        "diffusion_ratio": 0.01,
        "prediction": {"sweep_parameter": "k", "slow": [True, False],
                       "points": [_pred(v, g, t, tu) for v, (g, t, tu) in zip(values, regimes)]},
        "points": points,
    }
    return study, records


def with_extras(study: dict) -> dict:
    """The study with boundaries, widths and ratios sections (fake numbers)."""
    s = copy.deepcopy(study)
    s["boundaries"] = [{"dim": 1, "between": [0, 1], "low": 0.55, "high": 0.6,
                        "outcomes": ["baseline", "stationary-pattern"], "spike_limit": 0.62, "linear": None}]
    s["widths"] = [{"dim": 1, "index": 1, "width": w, "low": 0.5 / w, "high": 0.6 / w} for w in (0.02, 0.1, 0.5)]
    s["ratios"] = [{"ratio": r, "store_prefix": f"r{r}", "agree_fraction": f, "threshold_low": 0.7,
                    "threshold_high": 0.9, "threshold_lpa": 0.8} for r, f in ((1e-3, 1.0), (1e-2, 0.8), (0.1, 0.4))]
    return s


@pytest.fixture
def study_maker():
    """:func:`make_study`: (study, records) with one point per regime; ``outcomes`` replaces runs."""
    return make_study


@pytest.fixture
def record_maker():
    """:func:`record`: one RunRecord with a small final state."""
    return record


@pytest.fixture
def study_extras():
    """:func:`with_extras`: a copy of a study with boundaries, widths and ratios."""
    return with_extras
