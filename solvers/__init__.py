"""Full-PDE solvers: discretisations, time stepping, settling, starts, outcome classification.

Solvers take arrays, sparse operators and callables; they know nothing of cases, regimes or stores.
"""

from __future__ import annotations

from .classify import OUTCOMES, Outcome, PatternFeatures, Tolerances, classify, pattern_features
from .fem import disk_p1, interval_p1, make_discretisation, rectangle_p1
from .grids import interval_fv, rectangle_fv
from .records import Discretisation, History
from .settle import SettleRule, polish
from .stability import is_stable, rightmost_eigenvalues
from .starts import noise_state, pulse_state
from .stepping import RunResult, StopRun, integrate
from .system import MolSystem

__all__ = [
    "OUTCOMES", "Discretisation", "History", "MolSystem", "Outcome", "PatternFeatures", "RunResult", "SettleRule",
    "StopRun", "Tolerances", "classify", "disk_p1", "integrate", "interval_fv", "interval_p1", "is_stable",
    "make_discretisation", "noise_state", "pattern_features", "polish", "pulse_state", "rectangle_fv",
    "rectangle_p1", "rightmost_eigenvalues",
]
