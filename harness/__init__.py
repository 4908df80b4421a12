"""rdcheck harness: case files, the model layer, predictions, planning, stores, reports and the CLI."""

from __future__ import annotations

from .kinetics import Kinetics, conserved_basis, reduced_eigenvalues

__all__ = ["Kinetics", "conserved_basis", "reduced_eigenvalues"]

__version__ = "0.1.0"
