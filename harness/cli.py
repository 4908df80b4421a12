"""The `rdcheck` command line: a thin argparse layer over functions that are also callable from Python."""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Callable, Sequence

from .errors import InputError

__all__ = ["main"]

COMMANDS: dict[str, Callable[[argparse.Namespace], int]] = {}


def command(name: str) -> Callable:
    """Register a sub-command handler under ``name``."""

    def register(fun: Callable[[argparse.Namespace], int]) -> Callable[[argparse.Namespace], int]:
        COMMANDS[name] = fun
        return fun

    return register


class _Parser(argparse.ArgumentParser):
    """An argument parser whose usage errors are one line and exit status 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        sys.stderr.write(f"{self.prog}: error: {message}\n")
        raise SystemExit(2)


def _parser() -> argparse.ArgumentParser:
    parser = _Parser(prog="rdcheck", description="Check spike-limit and linear predictions of a "
                     "reaction-diffusion model against the full PDE.")
    sub = parser.add_subparsers(dest="command", required=True, parser_class=_Parser)

    p = sub.add_parser("predict", help="spike-limit (LPA) regimes and thresholds, and linear analysis")
    _case_args(p)
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout")
    p.add_argument("--plot", metavar="FILE", help="draw states against the sweep parameter (PNG or PDF)")
    p = sub.add_parser("simulate", help="one full-PDE run from the baseline HSS plus a pulse or noise")
    _case_args(p)
    p.add_argument("--start", required=True, metavar="pulse:HEIGHT|noise:AMPLITUDE", help="how the run starts")
    p.add_argument("--dim", type=int, choices=(1, 2), default=1, help="spatial dimension (default 1)")
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout")
    p.add_argument("--save", metavar="FILE", help="write coordinates, snapshots and the outcome to HDF5")
    p.add_argument("--plot", metavar="FILE", help="space-time picture (1D) or final state (2D), PNG or PDF")
    p = sub.add_parser("threshold", help="the pulse height really needed at one point (bisection on the PDE)")
    _case_args(p)
    p.add_argument("--dim", type=int, choices=(1, 2), default=1, help="spatial dimension (default 1)")
    p.add_argument("--tolerance", type=float, default=0.02, help="relative bracket tolerance (default 0.02)")
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout")
    p = sub.add_parser("validate", help="the whole study: predictions against full-PDE runs, into a store")
    _case_args(p)
    p.add_argument("--store", metavar="FILE", help="HDF5 store (default: out/<case name>.h5); rerun to resume")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--workers", type=int, metavar="N", help="local worker processes (default: all cores)")
    where.add_argument("--scheduler", metavar="ADDRESS", help="run on an existing Dask cluster")
    p.add_argument("--shard", metavar="K/N", help="run the K-th of N deterministic slices (job arrays)")
    p.add_argument("--quick", action="store_true", help="coarse grids, 1D only, at most 11 sweep points")
    p.add_argument("--dims", default="1,2", metavar="1,2", help="dimensions to run (default 1,2)")
    p.add_argument("--every-2d", type=int, default=3, metavar="K", help="2D runs on every K-th point (default 3)")
    p.add_argument("--tolerance", type=float, default=0.02, help="relative threshold bracket (default 0.02)")
    p.add_argument("--wall-limit", type=float, metavar="SECONDS", help="per-run wall-time limit")
    p.add_argument("--widths", metavar="W1,W2,...", help="also measure thresholds at these pulse widths")
    p.add_argument("--ratios", metavar="R1,R2,...", help="repeat the study at D_slow = R x D_fast")

    p = sub.add_parser("report", help="agreement tables and figures from one or more stores")
    p.add_argument("stores", nargs="+", metavar="STORE", help="store file(s); several are merged")
    p.add_argument("--out", default="report", metavar="DIR", help="output folder (default: report)")
    p.add_argument("--format", default="md,csv,tex", help="tables to write (default md,csv,tex)")

    p = sub.add_parser("compare", help="exit 1 where a regime, an outcome or a threshold moved")
    p.add_argument("baseline", metavar="BASELINE", help="store of the reference run")
    p.add_argument("current", metavar="CURRENT", help="store of the new run")

    p = sub.add_parser("merge", help="merge shard stores into one")
    p.add_argument("stores", nargs="+", metavar="STORE", help="shard stores")
    p.add_argument("--out", required=True, metavar="FILE", help="merged store")
    return parser


def _case_args(p: argparse.ArgumentParser) -> None:
    p.add_argument("case", help="case file (TOML)")
    p.add_argument("--set", dest="overrides", action="append", default=[], metavar="NAME=VALUE",
                   help="override a parameter (NAME=VALUE) or any case key (SECTION.KEY=VALUE)")


def _load(args: argparse.Namespace):
    from .case import load_case
    from .model import build_model

    case = load_case(args.case, args.overrides)
    return case, build_model(case)


@command("predict")
def _predict(args: argparse.Namespace) -> int:
    from .predict import predict_boundaries, predict_case, predict_diagram, prediction_json, prediction_table

    case, model = _load(args)
    points = predict_case(case, model)
    boundaries = None
    if args.plot:
        from .figures import plot_prediction

        diagram = predict_diagram(case, model, points)  # located once, for the figure and the JSON
        boundaries = predict_boundaries(case, model, points, diagram) if diagram is not None else []
        plot_prediction(case, model, points, args.plot, diagram=diagram, boundaries=boundaries)
    if args.json:
        json.dump(prediction_json(case, model, points, boundaries), sys.stdout, allow_nan=False)
        sys.stdout.write("\n")
    else:
        sys.stdout.write(prediction_table(case, model, points))
    return 0


def _show_warning(message, category, filename, lineno, file=None, line=None) -> None:
    """Warnings reach the user as one line on stderr, without a source location."""
    sys.stderr.write(f"rdcheck: warning: {message}\n")


def _single_point(case, path: str) -> dict[str, float]:
    """The one parameter point of a call that must run at a single point (`--set` the sweep parameter)."""
    points = case.points()
    if len(points) != 1:
        name = case.sweep.parameter
        msg = f"{path}: `sweep.parameter`: this command runs one point; give `--set {name}=VALUE`"
        raise InputError(msg)
    return points[0]


@command("simulate")
def _simulate(args: argparse.Namespace) -> int:
    from .simulate import ProgressBar, parse_start, simulate

    start = parse_start(args.start)
    case, model = _load(args)
    params = _single_point(case, args.case)
    result = simulate(case, model, params, start, dim=args.dim, observers=(ProgressBar(start.label()),))
    if args.save:
        from .output import save_simulation

        save_simulation(args.save, model, result)
    if args.plot:
        from .figures import plot_simulation

        plot_simulation(args.plot, model, result)
    if args.json:
        json.dump(result.to_json(model.species), sys.stdout, allow_nan=False)
        sys.stdout.write("\n")
    else:
        o = result.outcome
        drift = "-" if result.mass_drift is None else f"{result.mass_drift:.2e}"
        sys.stdout.write(f"{o.outcome}: {o.reason}\n  t_final = {result.run.t_final:.6g}, steps = "
                         f"{result.run.nsteps}, mass drift = {drift}, {result.dim}D {result.shape} with "
                         f"{result.coords.shape[0]} nodes, {result.wall:.2f} s\n")
    return 0


@command("threshold")
def _threshold(args: argparse.Namespace) -> int:
    from .simulate import ProgressBar
    from .validate import measure_threshold

    tolerance = _fraction(args.tolerance, "--tolerance")
    case, model = _load(args)
    params = _single_point(case, args.case)
    result = measure_threshold(case, model, params, dim=args.dim, tol=tolerance,
                               observers_for=lambda label: (ProgressBar(label),))
    if args.json:
        json.dump(result, sys.stdout, allow_nan=False)
        sys.stdout.write("\n")
    else:
        def fmt(x):
            return "-" if x is None else f"{x:.6g}"

        sys.stdout.write(f"threshold ({result['dim']}D, {result['resolution']} cells): did not pattern at "
                         f"{fmt(result['low'])}, patterned at {fmt(result['high'])} ({result['status']}); "
                         f"spike-limit prediction {fmt(result['lpa'])}\n")
        for r in result["runs"]:
            sys.stdout.write(f"  pulse {r['height']:.6g}: {r['outcome']}\n")
    return 0


def _fraction(value: float, option: str) -> float:
    """A relative tolerance given on the command line: strictly between 0 and 1."""
    if not 0 < value < 1:
        msg = f"`{option}`: expected a number in (0, 1), got {value!r}"
        raise InputError(msg)
    return value


def _int_list(text: str, option: str, allowed: tuple[int, ...]) -> tuple[int, ...]:
    try:
        values = tuple(int(v) for v in text.split(","))
    except ValueError:
        values = ()
    if not values or any(v not in allowed for v in values):
        msg = f"`{option}`: expected a comma-separated list of {', '.join(map(str, allowed))}, got {text!r}"
        raise InputError(msg)
    return tuple(sorted(set(values)))


def _positive_list(text: str | None, option: str) -> tuple[float, ...]:
    if text is None:
        return ()
    try:
        values = tuple(float(v) for v in text.split(","))
    except ValueError:
        values = ()
    if not values or not all(0 < v < float("inf") for v in values):
        msg = f"`{option}`: expected a comma-separated list of positive numbers, got {text!r}"
        raise InputError(msg)
    return values


@command("validate")
def _validate(args: argparse.Namespace) -> int:
    from pathlib import Path

    from .case import load_case
    from .execute import parse_shard
    from .validate import ValidateOptions, validate

    dims = _int_list(args.dims, "--dims", (1, 2))
    if args.workers is not None and args.workers < 0:
        msg = f"`--workers`: expected an integer >= 0, got {args.workers}"
        raise InputError(msg)
    tolerance = _fraction(args.tolerance, "--tolerance")
    if args.every_2d < 1:
        msg = f"`--every-2d`: expected an integer >= 1, got {args.every_2d}"
        raise InputError(msg)
    shard = None if args.shard is None else parse_shard(args.shard)
    load_case(args.case, args.overrides)  # a bad case file stops here, before anything is written
    store = args.store or str(Path("out") / f"{Path(args.case).stem}.h5")
    Path(store).parent.mkdir(parents=True, exist_ok=True)
    options = ValidateOptions(store=store, dims=dims, every_2d=args.every_2d, quick=args.quick,
                              tolerance=tolerance, workers=args.workers, scheduler=args.scheduler,
                              shard=shard, wall_limit=args.wall_limit,
                              widths=_positive_list(args.widths, "--widths"),
                              ratios=_positive_list(args.ratios, "--ratios"))
    study = validate(args.case, args.overrides, options)
    runs = sum(len(r.get("pulses", [])) + 1 for p in study["points"] for r in p["runs"].values())
    sys.stdout.write(f"validated {len(study['points'])} sweep points ({runs} planned runs and searches) "
                     f"into {store}; next: rdcheck report {store}\n")
    return 0


@command("report")
def _report(args: argparse.Namespace) -> int:
    from .report import report_store

    formats = tuple(f.strip() for f in args.format.split(",") if f.strip())
    written = report_store(args.stores, args.out, formats)
    sys.stdout.write(f"wrote {len(written)} files into {args.out}\n")
    return 0


@command("compare")
def _compare(args: argparse.Namespace) -> int:
    from .compare import compare_stores

    text, code = compare_stores(args.baseline, args.current)
    sys.stdout.write(text if text.endswith("\n") else text + "\n")
    return code


@command("merge")
def _merge(args: argparse.Namespace) -> int:
    from .store import merge_stores

    merge_stores(args.stores, args.out)
    sys.stdout.write(f"merged {len(args.stores)} stores into {args.out}\n")
    return 0


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; returns the exit status (0 ok, 1 a check failed, 2 bad input)."""
    import warnings

    args = _parser().parse_args(argv)
    with warnings.catch_warnings():
        warnings.simplefilter("default")
        warnings.showwarning = _show_warning
        try:
            return COMMANDS[args.command](args)
        except InputError as exc:
            sys.stderr.write(f"rdcheck: error: {exc}\n")
            return 2
        except BrokenPipeError:
            return 0


if __name__ == "__main__":  # pragma: no cover
    raise SystemExit(main())
