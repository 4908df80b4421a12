"""Full-PDE solvers: discretisations, time stepping, settling, outcome classification.

Solvers take arrays, sparse operators and callables; they know nothing of cases or stores.
"""

from __future__ import annotations

from .records import Discretisation, History

__all__ = ["Discretisation", "History"]
