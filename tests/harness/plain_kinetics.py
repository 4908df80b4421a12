"""Kinetics built from plain numpy callables, for tests that must not depend on the model layer."""

from __future__ import annotations

import numpy as np

from harness.kinetics import Kinetics


def kinetics(f, jac, species, slow, conservation=None) -> Kinetics:
    """Kinetics from plain numpy callables ``f(u) -> (n, m)`` and ``jac(u) -> (n, n, m)``."""
    n = len(species)
    w = np.zeros((0, n)) if conservation is None else np.asarray(conservation, dtype=float).reshape(-1, n)
    slow = np.asarray(slow, dtype=bool)
    return Kinetics(
        species=tuple(species), diffusion=np.where(slow, 0.01, 1.0), slow=slow, conservation=w, reaction=f, jacobian=jac
    )
