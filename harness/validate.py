"""`rdcheck validate`: plan the runs, run them (resumably), search thresholds and boundaries, and write the
"study" document that the report reads.

The plan per sweep point and dimension: a noise start; pulse starts at heights chosen from the prediction
(below and above the predicted threshold, and a large one); a threshold search (bisection on the pulse
height) where a pulse can pattern, with a refinement check one grid level finer at the bracket's ends;
then, between neighbouring points whose PDE behaviour differs, a boundary search (bisection on the sweep
parameter). Every round of runs goes through the executor and the store, so a rerun recomputes nothing.

The result is the store's "study" document: ``case``, ``overrides``, ``model``, ``sweep_parameter``,
``species``, ``dims``, ``resolution`` and ``domain`` (per dimension), ``tolerance``, ``diffusion_ratio``,
``prediction`` (the `predict --json` object), ``points`` (per point: ``index``, ``params``, ``value``,
``runs[dim] = {"noise": key, "pulses": [[height, key], ...]}``, ``threshold[dim] = {"low", "high",
"resolution", "refined": {"resolution", "low", "high", "held"} | None, "status"}``), ``boundaries`` (``dim``,
``between``, ``low``, ``high``, ``outcomes``, ``spike_limit``, ``linear``), and with the options ``widths``
(``dim``, ``index``, ``width``, ``low``, ``high``, ``status``) and ``ratios`` (``ratio``, ``dim``,
``agree_fraction``, ``threshold_ratio``, ...). Thresholds are magnitudes along the case's pulse direction.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from .case import Case, load_case
from .errors import InputError
from .model import Model, build_model
from .runs import RunRecord, RunTask, verdict
from .search import BoundarySearch, ThresholdSearch

__all__ = ["ValidateOptions", "measure_threshold", "plan_heights", "validate"]


@dataclass(frozen=True)
class ValidateOptions:
    """How a validation runs (everything not in the case file)."""

    store: str
    dims: tuple[int, ...] = (1, 2)
    every_2d: int = 3
    quick: bool = False
    tolerance: float = 0.02
    workers: int | None = None
    scheduler: str | None = None
    shard: tuple[int, int] | None = None
    wall_limit: float | None = None
    refine: bool = True
    boundaries: bool = True
    progress: bool = True
    widths: tuple[float, ...] = ()
    ratios: tuple[float, ...] = ()


def quick_overrides(case: Case) -> list[str]:
    """`--quick`: coarse grids and at most 11 sweep points (1D only is set in the options)."""
    values = case.sweep.values
    step = max(1, int(np.ceil(len(values) / 11)))
    chosen = list(values[::step])
    if chosen[-1] != values[-1] and len(chosen) < 12:
        chosen.append(values[-1])
    cells = max(50, case.solver.cells_1d // 2)
    return [f"solver.cells_1d={cells}", f"sweep.values=[{', '.join(repr(v) for v in chosen)}]"]


def plan_heights(lpa: float | None, cap: float) -> list[float]:
    """Pulse magnitudes of the first round: half and twice the predicted threshold, and a large one."""
    heights = [cap / 4]
    if lpa is not None and lpa > 0:
        heights = [0.5 * lpa, 2.0 * lpa, cap / 4]
    return sorted({float(f"{h:.6g}") for h in heights if 0 < h <= cap})


def height_cap(case: Case, model: Model, hss: np.ndarray, lpa: float | None, sign: int) -> float:
    """Largest pulse magnitude tried: the case's own height if given, else 4x the larger of the predicted
    threshold and the pulse species' scale; a downward pulse never goes below zero."""
    idx = [model.species.index(s) for s in (case.pulse.species if case.pulse else ())]
    scale = max([abs(float(hss[i])) for i in idx] + [0.5])
    cap = abs(case.pulse.height) if case.pulse and case.pulse.height else 4.0 * max(lpa or 0.0, scale)
    if sign < 0 and idx:
        cap = min(cap, 0.999 * min(float(hss[i]) for i in idx))
    return cap


class _Runner:
    """Runs batches of tasks through the executor into the store, keeping every record by key."""

    def __init__(self, options: ValidateOptions, store) -> None:
        self.options, self.store = options, store
        self.records: dict[str, RunRecord] = {}

    @staticmethod
    def key(task: RunTask) -> str:
        from .execute import task_key

        return task_key(task)

    def run(self, tasks: Sequence[RunTask]) -> list[RunRecord]:
        from .execute import execute

        if not tasks:
            return []
        o = self.options
        out = execute(list(tasks), self.store, key_of=self.key, workers=o.workers, scheduler=o.scheduler,
                      wall_limit=o.wall_limit, progress=o.progress)
        for rec in out:
            self.records[rec.key] = rec
        return out

    def patterned(self, task: RunTask) -> bool | None:
        """The verdict of a task that was run."""
        return verdict(self.records[self.key(task)].outcome)


@dataclass
class _Searched:
    """What the width study needs of a study's threshold searches."""

    case: Case
    overrides: list[str]
    sign: int
    resolution: dict[int, int]
    points: dict[tuple[int, int], tuple[object, float]]  # (index, dim) -> (PointPrediction, height cap)


def _task(case_path: str, overrides: Sequence[str], params: dict, kind: str, value: float, dim: int,
          resolution: int, purpose: str, hss: np.ndarray) -> RunTask:
    return RunTask(case_path, tuple(overrides), tuple(sorted(params.items())), kind, float(value), dim,
                   int(resolution), purpose, tuple(float(v) for v in hss))


def _owned(value: float, shard: tuple[int, int] | None) -> bool:
    """Whether shard ``(K, N)`` owns the sweep point at ``value`` (all points without sharding)."""
    from .execute import shard_index

    return shard is None or shard_index(repr(float(value)), shard[1]) == shard[0]


def validate(case_path: str, overrides: Sequence[str], options: ValidateOptions,
             store_factory: Callable | None = None) -> dict:
    """Run the whole validation of a case into ``options.store``; returns the study document.

    With ``options.widths`` the threshold searches are repeated at each pulse width; with ``options.ratios``
    the study is repeated (without boundary searches) at each diffusion ratio D_slow = ratio x D_fast.
    """
    from .store import Store

    store = (store_factory or Store)(options.store)
    study, runner, searched = _study(case_path, overrides, options, store)
    if options.widths:
        study["widths"] = _width_study(runner, searched, options)
    if options.ratios:
        study["ratios"] = _ratio_study(case_path, overrides, options, store)
    store.put_doc("study", study)
    store.consolidate()
    return study


def _study(case_path: str, overrides: Sequence[str], options: ValidateOptions,
           store) -> tuple[dict, _Runner, _Searched]:
    """Predictions, planned runs, threshold and boundary searches of one case; the study, its runner and
    what the threshold searches ran on."""
    from .predict import predict_case, prediction_json, pulse_setup

    case = load_case(case_path, overrides)
    overrides = list(overrides)
    if options.quick:
        overrides += quick_overrides(case)
        case = load_case(case_path, overrides)
    model = build_model(case)
    dims = (1,) if options.quick else tuple(options.dims)
    prediction = predict_case(case, model)
    pjson = prediction_json(case, model, prediction)
    _, sign = pulse_setup(case, model)
    noise_amp = case.noise.amplitude if case.noise else 1e-3
    res = {1: case.solver.cells_1d, 2: case.solver.cells_2d}
    runner = _Runner(options, store)

    # step: which (point, dim) pairs this call runs
    owned = [i for i, p in enumerate(prediction) if _owned(p.value, options.shard)]
    needed = sorted(set(owned) | {i + 1 for i in owned if i + 1 < len(prediction)})
    pairs = [(i, d) for i in needed for d in dims if d == 1 or i % options.every_2d == 0 or i == len(prediction) - 1]

    # step: first round, noise and planned pulses
    first, plan = [], {}
    for i, d in pairs:
        p = prediction[i]
        if p.hss is None:
            continue
        cap = height_cap(case, model, p.hss, p.threshold, sign)
        heights = plan_heights(p.threshold, cap)
        noise = _task(case.path, overrides, p.params, "noise", noise_amp, d, res[d], "noise", p.hss)
        pulses = [_task(case.path, overrides, p.params, "pulse", sign * h, d, res[d], "pulse", p.hss)
                  for h in heights] if case.pulse else []
        plan[i, d] = (noise, pulses, cap)
        first += [noise, *pulses]
    runner.run(first)

    entries = {i: {"index": i, "params": prediction[i].params, "value": prediction[i].value, "runs": {},
                   "threshold": {}} for i in needed}
    for (i, d), (noise, pulses, _) in plan.items():
        entries[i]["runs"][str(d)] = {"noise": runner.key(noise),
                                      "pulses": [[t.start_value, runner.key(t)] for t in pulses]}

    # step: threshold searches, one round of parallel runs at a time
    searches = {}
    for (i, d), (noise, pulses, cap) in plan.items():
        if i not in owned or not pulses:
            continue
        noise_pat = runner.patterned(noise)
        pulse_pat = [runner.patterned(t) for t in pulses]
        if prediction[i].regime == "pulse-triggered" or (noise_pat is False and any(pulse_pat)):
            s = ThresholdSearch(cap=cap, tol=options.tolerance)
            for t, pat in zip(pulses, pulse_pat):
                s.tell(abs(t.start_value), pat)
            searches[i, d] = s
        else:
            entries[i]["threshold"][str(d)] = {"low": None, "high": None, "resolution": res[d], "refined": None,
                                               "status": "not-searched"}

    def threshold_task(key: tuple[int, int], h: float) -> RunTask:
        p, d = prediction[key[0]], key[1]
        return _task(case.path, overrides, p.params, "pulse", sign * h, d, res[d], "threshold", p.hss)

    for (i, d), t in _run_searches(runner, searches, threshold_task):
        entries[i]["runs"][str(d)]["pulses"].append([t.start_value, runner.key(t)])

    # step: refinement check at the bracket ends, one grid level finer
    refine = {}
    for (i, d), s in searches.items():
        if options.refine and s.status == "bracketed":
            p = prediction[i]
            refine[i, d] = [_task(case.path, overrides, p.params, "pulse", sign * h, d, 2 * res[d], "refine", p.hss)
                            for h in (s.low, s.high)]
    runner.run([t for ts in refine.values() for t in ts])
    for (i, d), s in searches.items():
        refined = None
        if (i, d) in refine:
            lo_t, hi_t = refine[i, d]
            lo_p, hi_p = runner.patterned(lo_t), runner.patterned(hi_t)
            refined = {"resolution": 2 * res[d], "low": s.low, "high": s.high,
                       "held": lo_p is False and hi_p is True}
        entries[i]["threshold"][str(d)] = {"low": s.low, "high": s.high, "resolution": res[d],
                                           "refined": refined, "status": s.status}

    # step: boundary searches between neighbours whose behaviour differs
    boundaries = _boundaries(case, model, prediction, plan, runner, options, overrides, owned, sign, noise_amp, res,
                             pjson.get("boundaries", [])) if options.boundaries else []

    diffusion = model.diffusion(case.parameters)
    d_slow = max(float(v) for v, s in zip(diffusion, model.slow) if s)
    fast = [float(v) for v, s in zip(diffusion, model.slow) if not s]
    study = {
        "case": case.path, "overrides": overrides, "model": model.name, "sweep_parameter": case.sweep.parameter,
        "species": list(model.species), "dims": list(dims), "resolution": {str(d): res[d] for d in dims},
        "tolerance": options.tolerance,
        "domain": {str(d): {"shape": case.domain.for_dim(d).shape, "size": list(case.domain.for_dim(d).size)}
                   for d in dims},
        "diffusion_ratio": d_slow / min(fast) if min(fast) > 0 else None,
        "prediction": pjson,
        "points": [entries[i] for i in sorted(entries) if i in owned],
        "boundaries": boundaries,
        "shard": None if options.shard is None else list(options.shard),
        "pulse_width": case.pulse.width if case.pulse else None,
    }
    searched = _Searched(case, overrides, sign, res, {k: (prediction[k[0]], s.cap) for k, s in searches.items()})
    return study, runner, searched


def _signature(runner: _Runner, noise: RunTask, pulses: Sequence[RunTask]) -> tuple | None:
    """PDE behaviour at a point: (noise patterned, some pulse patterned); None if a run gave no verdict."""
    n = runner.patterned(noise)
    ps = [runner.patterned(t) for t in pulses]
    if n is None or any(p is None for p in ps):
        return None
    return (n, any(ps))


def _boundaries(case, model, prediction, plan, runner, options, overrides, owned, sign, noise_amp, res,
                located: Sequence[dict] = ()) -> list:
    from .equilibria import baseline_hss

    out, searches = [], []
    name = case.sweep.parameter
    for d in sorted({d for _, d in plan}):
        for i in owned:
            if (i, d) not in plan or (i + 1, d) not in plan:
                continue
            a, b = plan[i, d], plan[i + 1, d]
            sa, sb = _signature(runner, a[0], a[1]), _signature(runner, b[0], b[1])
            if sa is None or sb is None or sa == sb:
                continue
            s = BoundarySearch(prediction[i].value, prediction[i + 1].value, sa, sb)
            searches.append((d, i, s, prediction[i].hss, max(abs(t.start_value) for t in a[1]) if a[1] else None))
    while True:
        batch = []
        for d, i, s, hss_left, big in searches:
            v = s.next_value()
            if v is None:
                continue
            params = {**prediction[i].params, name: v}
            eq = baseline_hss(model.kinetics(params), hss_left)
            if eq is None:
                continue
            noise = _task(case.path, overrides, params, "noise", noise_amp, d, res[d], "boundary", eq.state)
            pulses = [_task(case.path, overrides, params, "pulse", sign * big, d, res[d], "boundary", eq.state)] \
                if big else []
            batch.append((s, v, noise, pulses))
        if not batch:
            break
        runner.run([t for _, _, n, ps in batch for t in (n, *ps)])
        progressed = False
        for s, v, noise, pulses in batch:
            sig = _signature(runner, noise, pulses)
            if sig is None:
                s.stop()  # no verdict here: the bracket stays at what was located
                continue
            s.tell(v, sig)
            progressed = True
        if not progressed:
            break
    for d, i, s, _, _ in searches:
        out.append({"dim": d, "between": [i, i + 1], "low": min(s.left, s.right), "high": max(s.left, s.right),
                    "outcomes": [list(s.sig_left), list(s.sig_right)],
                    **_predicted_boundaries(prediction, i, located)})
    return out


def _predicted_boundaries(prediction, i: int, located: Sequence[dict]) -> dict:
    """Where the spike-limit regime and the linear verdict change between points i and i+1: the located
    boundary of the prediction's continuation where there is one, else the midpoint; None where neither
    changes. (The linear value is the midpoint: the verdict is point-wise.)"""
    a, b = prediction[i], prediction[i + 1]
    lo, hi = sorted((a.value, b.value))
    mid = 0.5 * (a.value + b.value)
    exact = [float(x["value"]) for x in located if lo <= float(x["value"]) <= hi]
    lin_a = a.linear.turing_unstable if a.linear else None
    lin_b = b.linear.turing_unstable if b.linear else None
    spike = (exact[0] if exact else mid) if a.regime != b.regime else None
    return {"spike_limit": spike, "linear": mid if lin_a != lin_b else None}


def measure_threshold(case: Case, model: Model, params: dict, dim: int = 1, tol: float = 0.02,
                      observers_for: Callable[[str], Sequence] | None = None) -> dict:
    """The pulse height really needed at one point, by bisection on full-PDE runs made here and now.

    Returns ``{"low", "high", "lpa", "status", "runs", ...}``: ``low`` did not pattern, ``high`` did (None where
    no such run exists), ``lpa`` the spike-limit prediction in the case's pulse direction.
    """
    from .predict import predict_case, pulse_setup
    from .simulate import Start, simulate

    if case.pulse is None:
        msg = f"{case.path}: `starts.pulse`: missing (a threshold needs a pulse)"
        raise InputError(msg)
    point = predict_case(case, model)[0]
    if point.hss is None:
        msg = f"{case.path}: `baseline.guess`: no homogeneous steady state found near it at {params}"
        raise InputError(msg)
    _, sign = pulse_setup(case, model)
    cap = height_cap(case, model, point.hss, point.threshold, sign)
    search = ThresholdSearch(cap=cap, tol=tol)
    runs = []

    def run(h: float) -> None:
        obs = observers_for(f"pulse:{sign * h:.4g}") if observers_for else ()
        try:
            sim = simulate(case, model, params, Start("pulse", sign * h), dim=dim, observers=obs, hss=point.hss)
        except InputError:
            search.tell(h, None)
            runs.append({"height": sign * h, "outcome": "not admissible"})
            return
        search.tell(h, verdict(sim.outcome.outcome))
        runs.append({"height": sign * h, "outcome": sim.outcome.outcome})

    for h in plan_heights(point.threshold, cap):
        run(h)
    while (h := search.next_height()) is not None:
        run(h)
    low, high = search.low, search.high
    resolution = case.solver.cells_1d if dim == 1 else case.solver.cells_2d
    return {"low": None if low is None else sign * low, "high": None if high is None else sign * high,
            "lpa": point.threshold, "status": search.status, "dim": dim, "resolution": resolution,
            "tolerance": tol, "runs": runs}


def _run_searches(runner: _Runner, searches: dict, make_task: Callable) -> list[tuple[object, RunTask]]:
    """Advance threshold searches one round of parallel runs at a time until every one is over; returns the
    ``(search key, task)`` pairs run, in order."""
    made = []
    while True:
        batch = {}
        for key, s in searches.items():
            h = s.next_height()
            if h is not None:
                batch[key] = (h, make_task(key, h))
        if not batch:
            return made
        runner.run([t for _, t in batch.values()])
        for key, (h, t) in batch.items():
            searches[key].tell(h, runner.patterned(t))
            made.append((key, t))


def _width_study(runner: _Runner, searched: _Searched, options: ValidateOptions) -> list[dict]:
    """Threshold brackets at each pulse width, where the main search ran (same points and dimensions)."""
    widths = [w for w in options.widths if w > 0]
    searches = {(i, d, w): ThresholdSearch(cap=cap, tol=options.tolerance)
                for (i, d), (_, cap) in searched.points.items() for w in widths}

    def make(key, h):
        i, d, w = key
        point = searched.points[i, d][0]
        return _task(searched.case.path, [*searched.overrides, f"starts.pulse.width={w!r}"], point.params, "pulse",
                     searched.sign * h, d, searched.resolution[d], "width", point.hss)

    seeds = [(key, h, make(key, h)) for key, s in searches.items()  # the first round, as in the main plan
             for h in plan_heights(searched.points[key[:2]][0].threshold, s.cap)]
    runner.run([t for _, _, t in seeds])
    for key, h, t in seeds:
        searches[key].tell(h, runner.patterned(t))
    _run_searches(runner, searches, make)
    return [{"dim": d, "index": i, "width": w, "low": s.low, "high": s.high, "status": s.status}
            for (i, d, w), s in sorted(searches.items())]


def slow_diffusion_overrides(case: Case, model: Model, ratio: float) -> list[str]:
    """`--set` lines giving the slow species D = ratio x min(D_fast), their own proportions kept."""
    d = model.diffusion(case.parameters)
    fast = min(float(v) for v, slow in zip(d, model.slow) if not slow)
    slow = [(name, float(v)) for name, v, is_slow in zip(model.species, d, model.slow) if is_slow]
    top = max(v for _, v in slow)
    return [f"species.{name}.diffusion={ratio * fast * (v / top if top > 0 else 1.0)!r}" for name, v in slow]


def _ratio_study(case_path: str, overrides: Sequence[str], options: ValidateOptions, store) -> list[dict]:
    """The study repeated at each diffusion ratio: agreement fraction and measured / predicted threshold."""
    from dataclasses import replace

    from .report import agreement_rows

    case = load_case(case_path, overrides)
    model = build_model(case)
    sub_options = replace(options, boundaries=False, refine=False, widths=(), ratios=())
    out = []
    for ratio in options.ratios:
        sub, runner, _ = _study(case_path, [*overrides, *slow_diffusion_overrides(case, model, ratio)],
                                sub_options, store)
        rows = agreement_rows(sub, runner.records)
        for d in sub["dims"]:
            verdicts = [r.get(f"agree_{d}d") for r in rows]
            decided = [v for v in verdicts if v is not None]
            ratios = [0.5 * (r[f"threshold_low_{d}d"] + r[f"threshold_high_{d}d"]) / r["threshold_lpa"]
                      for r in rows if r.get(f"threshold_low_{d}d") is not None
                      and r.get(f"threshold_high_{d}d") is not None and r.get("threshold_lpa")]
            out.append({"ratio": ratio, "dim": d, "agree_fraction": sum(decided) / len(decided) if decided else None,
                        "decided": len(decided), "points": len(rows),
                        "threshold_ratio": float(np.median(ratios)) if ratios else None,
                        "thresholds_bracketed": len(ratios)})
    return out
