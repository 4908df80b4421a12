"""Full-PDE solvers: discretisations, time stepping, settling, starts, outcome classification.

Solvers take arrays, sparse operators and callables; they know nothing of cases, regimes or stores.
"""

from __future__ import annotations

#: Public name -> the submodule that defines it.
_EXPORTS = {
    "OUTCOMES": "classify", "Outcome": "classify", "PatternFeatures": "classify", "Tolerances": "classify",
    "classify": "classify", "pattern_features": "classify", "disk_p1": "fem", "interval_p1": "fem",
    "make_discretisation": "fem", "rectangle_p1": "fem", "interval_fv": "grids", "rectangle_fv": "grids",
    "Discretisation": "records", "History": "records", "SettleRule": "settle", "polish": "settle",
    "is_stable": "stability", "rightmost_eigenvalues": "stability", "noise_state": "starts",
    "pulse_state": "starts", "RunResult": "stepping", "StopRun": "stepping", "integrate": "stepping",
    "MolSystem": "system",
}

__all__ = list(_EXPORTS)


def __getattr__(name: str):
    """Load a public name's module on first use, so that importing one submodule (a worker, the CLI) does
    not import every other one."""
    if name in _EXPORTS:
        from importlib import import_module

        return getattr(import_module(f".{_EXPORTS[name]}", __name__), name)
    msg = f"module {__name__!r} has no attribute {name!r}"
    raise AttributeError(msg)


def __dir__() -> list[str]:
    return sorted({*globals(), *_EXPORTS})
