"""rdcheck harness: case files, the model layer, predictions, runs, stores, reports and the CLI.

Everything the command line does is callable from Python::

    from harness import load_case, build_model, predict_case
    case = load_case("cases/demo_1d_membrane_switch.toml", ["s=0.3"])
    points = predict_case(case, build_model(case))
"""

from __future__ import annotations

__version__ = "0.1.0"

from .case import Case, load_case  # noqa: E402
from .errors import CaseError, InputError  # noqa: E402
from .kinetics import Kinetics, conserved_basis, reduced_eigenvalues  # noqa: E402
from .linear import linear_analysis  # noqa: E402
from .model import Model, build_model  # noqa: E402
from .predict import predict_case, prediction_json  # noqa: E402
from .simulate import Start, simulate  # noqa: E402
from .spike import spike_analysis  # noqa: E402

__all__ = [
    "Case", "CaseError", "InputError", "Kinetics", "Model", "Start", "__version__", "build_model",
    "conserved_basis", "linear_analysis", "load_case", "predict_case", "prediction_json", "reduced_eigenvalues",
    "simulate", "spike_analysis",
]
