"""rdcheck harness: case files, the model layer, predictions, runs, stores, reports and the CLI.

Everything the command line does is callable from Python::

    from harness import load_case, build_model, predict_case
    case = load_case("cases/demo_1d_membrane_switch.toml", ["s=0.3"])
    points = predict_case(case, build_model(case))
"""

from __future__ import annotations

__version__ = "0.1.0"

#: Public name -> the submodule that defines it.
_EXPORTS = {
    "Case": "case", "load_case": "case", "CaseError": "errors", "InputError": "errors", "Kinetics": "kinetics",
    "conserved_basis": "kinetics", "reduced_eigenvalues": "kinetics", "linear_analysis": "linear",
    "Model": "model", "build_model": "model", "predict_case": "predict", "prediction_json": "predict",
    "Start": "simulate", "simulate": "simulate", "spike_analysis": "spike",
}

__all__ = ["__version__", *_EXPORTS]


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
