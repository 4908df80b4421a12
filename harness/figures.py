"""Figures in rdcheck's own style: stability by line style, branch kind by colour, regimes as shaded bands."""

from __future__ import annotations

from collections.abc import Sequence
from contextlib import contextmanager

import numpy as np

__all__ = [
    "BRANCH_COLOURS",
    "FIELD_MAP",
    "POINT_MARKERS",
    "REGIME_SHADES",
    "plane_path",
    "plot_plane",
    "plot_prediction",
    "plot_simulation",
    "rdcheck_style",
]

#: Branch kinds; hues chosen to stay distinct under the common colour-vision deficiencies.
BRANCH_COLOURS = {"global": "#1f5f8b", "local": "#c8621b", "periodic": "#6b4c9a"}

#: Light tints behind the curves, one per spike-limit regime.
REGIME_SHADES = {
    "no-pattern": "#ececec",
    "pulse-triggered": "#f7e7b4",
    "self-patterning": "#cfe3f1",
    "self-oscillating": "#ecd3e4",
    "unresolved": "#ffffff",
}

#: Sequential colour map for concentration fields (perceptually uniform, readable in grey).
FIELD_MAP = "cividis"

_STYLE = {
    "figure.figsize": (6.4, 4.0),
    "figure.dpi": 120,
    "savefig.dpi": 200,
    "savefig.bbox": "tight",
    "font.size": 9.5,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.grid": False,
    "axes.titlesize": 10,
    "axes.titleweight": "bold",
    "axes.titlelocation": "left",
    "legend.frameon": False,
    "lines.linewidth": 1.6,
    "xtick.direction": "out",
    "ytick.direction": "out",
}


@contextmanager
def rdcheck_style():
    """Matplotlib settings of our own, restored on exit."""
    import matplotlib as mpl

    with mpl.rc_context(_STYLE):
        yield


def _draw_branch(ax, x: np.ndarray, y: np.ndarray, stable: np.ndarray, colour: str) -> None:
    """A branch drawn solid where stable at both ends of a segment, dashed otherwise; NaN leaves a gap."""
    if len(x) == 1:
        ax.plot(x, y, "o" if stable[0] else "x", color=colour, mfc=colour if stable[0] else "none")
        return
    solid = stable[:-1] & stable[1:]
    start = 0
    for i in range(1, len(solid) + 1):
        if i == len(solid) or solid[i] != solid[start]:
            ax.plot(x[start:i + 1], y[start:i + 1], "-" if solid[start] else "--", color=colour)
            start = i


def _shade_regimes(ax, x: np.ndarray, regimes: Sequence[str]) -> None:
    edges = np.concatenate([[x[0]], 0.5 * (x[1:] + x[:-1]), [x[-1]]]) if len(x) > 1 else np.array([x[0], x[0]])
    seen = set()
    for i, regime in enumerate(regimes):
        label = regime if regime not in seen else None
        seen.add(regime)
        hatch = "//" if regime == "unresolved" else None
        ax.axvspan(edges[i], edges[i + 1], color=REGIME_SHADES.get(regime, "#ffffff"), lw=0, label=label,
                   hatch=hatch, zorder=0)


#: Marker shapes of the special points (face white, edge dark): our own choice.
POINT_MARKERS = {"fold": "D", "hopf": "s", "branch": "o", "cycle-fold": "^"}
_POINT_EDGE = "#2b2b2b"


def _shade_bands(ax, edges: Sequence[float], regimes: Sequence[str]) -> None:
    """Regime bands between consecutive ``edges`` (``len(regimes) == len(edges) - 1``)."""
    seen = set()
    for lo, hi, regime in zip(edges[:-1], edges[1:], regimes):
        label = regime if regime not in seen else None
        seen.add(regime)
        hatch = "//" if regime == "unresolved" else None
        ax.axvspan(lo, hi, color=REGIME_SHADES.get(regime, "#ffffff"), lw=0, label=label, hatch=hatch, zorder=0)


def _boundary_bands(x: np.ndarray, regimes: Sequence[str], boundaries) -> tuple[list[float], list[str]] | None:
    """Band edges and regimes from the located boundaries, or None where they do not chain the sweep's regimes
    (then the bands fall back to midpoints between sweep points)."""
    order = np.argsort(x)
    xs, rs = x[order], [regimes[i] for i in order]
    bs = sorted(boundaries, key=lambda b: b.value)
    edges, bands = [float(xs[0])], [rs[0]]
    for b in bs:
        lo, hi = b.between if x[-1] >= x[0] else b.between[::-1]
        if lo != bands[-1]:
            return None
        edges.append(float(b.value))
        bands.append(hi)
    edges.append(float(xs[-1]))
    for xi, ri in zip(xs, rs):  # each sweep point must sit in a band of its own regime
        k = int(np.searchsorted(edges, xi, side="right")) - 1
        k = min(max(k, 0), len(bands) - 1)
        if bands[k] != ri and not any(abs(xi - e) <= 1e-9 * (xs[-1] - xs[0] or 1.0) for e in edges):
            return None
    return edges, bands


def plane_path(path: str) -> str:
    """Where `plot_prediction` writes the two-parameter picture: ``FILE`` with ``_plane`` before its suffix."""
    from pathlib import Path

    p = Path(path)
    return str(p.with_name(f"{p.stem}_plane{p.suffix}"))


def plot_prediction(case, model, points, path: str, diagram=None, boundaries=None, cycles=None,
                    measured=None) -> None:
    """The reduced system's bifurcation diagram over the sweep, saved to ``path``, and the two-parameter
    picture (diffusion ratio against the sweep parameter) to :func:`plane_path` of it.

    The first figure shows the first slow species: the global (HSS) branch and the local branches as
    continued curves (solid stable, dashed unstable), periodic orbits as max / min envelopes, special points
    by :data:`POINT_MARKERS`, regimes shaded between the located boundaries. ``diagram``, ``boundaries`` and
    ``cycles`` are computed when not given (``cycles``: a family of orbits from each Hopf point, at most 30
    steps each, rtol 1e-8: a picture, not a measurement). Falls back to the states at the sweep points where
    no diagram can be made (one point). ``measured`` (from a store, see :func:`_draw_measured`) overlays the
    PDE outcomes and measured threshold brackets.
    """
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from .predict import _family, predict_boundaries, predict_diagram

    slow_index = int(np.flatnonzero(model.slow)[0])
    x = np.array([p.value for p in points])
    regimes = [p.regime for p in points]
    diagram = predict_diagram(case, model, points) if diagram is None else diagram
    if diagram is not None and boundaries is None:
        boundaries = predict_boundaries(case, model, points, diagram)
    if diagram is not None and cycles is None:
        from .periodic import diagram_cycles

        cycles = diagram_cycles(_family(case, model), diagram, (float(x.min()), float(x.max())), max_steps=30,
                                rtol=1e-8)
    with rdcheck_style():
        fig, ax = plt.subplots()
        bands = _boundary_bands(x, regimes, boundaries or []) if diagram is not None else None
        if bands is None:
            _shade_regimes(ax, x, regimes)
        else:
            _shade_bands(ax, *bands)
        if diagram is None:
            _draw_points(ax, x, points, slow_index)
        else:
            _draw_diagram(ax, diagram, cycles or (), slow_index)
        if measured:
            _draw_measured(ax, points, measured, slow_index)
        if x.max() > x.min():
            ax.set_xlim(float(x.min()), float(x.max()))
        ax.set_xlabel(case.sweep.parameter)
        ax.set_ylabel(f"{model.species[slow_index]} (slow)")
        ax.set_title(f"{model.name}: reduced-system branches and regimes")
        ax.legend(loc="center left", bbox_to_anchor=(1.01, 0.5), fontsize=8)
        fig.savefig(path)
        plt.close(fig)
    if diagram is not None:
        plot_plane(case, model, points, diagram, boundaries or [], plane_path(path))


def _draw_measured(ax, points, measured, slow_index: int) -> None:
    """PDE evidence on the diagram: per sweep value, whether the 1D noise start patterned (a row of markers at
    the bottom) and the measured 1D threshold bracket drawn at HSS + [low, high], where the spike limit puts
    the unstable local branch (the basin boundary). ``measured`` maps sweep value -> {"noise": bool | None,
    "low": float | None, "high": float | None}."""
    hss = {p.value: p.hss for p in points if p.hss is not None}
    bottom = ax.get_ylim()[0]
    shown = set()
    for value, m in sorted(measured.items()):
        noise = m.get("noise")
        if noise is not None:
            label = "PDE noise start patterns" if noise else "PDE noise start returns"
            ax.plot(value, bottom, "P" if noise else "_", color="#222222", ms=6, clip_on=False,
                    label=None if label in shown else label)
            shown.add(label)
        lo, hi = m.get("low"), m.get("high")
        if value in hss and lo is not None and hi is not None:
            base = float(hss[value][slow_index])
            label = "PDE threshold, HSS + [low, high]"
            ax.plot([value, value], [base + lo, base + hi], "-", color="#222222", lw=3.0, solid_capstyle="butt",
                    label=None if label in shown else label)
            shown.add(label)


def _draw_points(ax, x: np.ndarray, points, slow_index: int) -> None:
    """States at the sweep points only (no continuation possible)."""
    hss = np.array([p.hss[slow_index] if p.hss is not None else np.nan for p in points])
    stable = np.array([bool(p.spike.spike_stable and p.spike.well_mixed_stable) for p in points])
    _draw_branch(ax, x, hss, stable, BRANCH_COLOURS["global"])
    for i, p in enumerate(points):
        for state in p.spike.local_states:
            ax.plot(x[i], state.values[0], "o" if state.stable else "x", ms=3.2, color=BRANCH_COLOURS["local"],
                    mfc=BRANCH_COLOURS["local"] if state.stable else "none")
    ax.plot([], [], "-", color=BRANCH_COLOURS["global"], label="HSS (stable)")
    ax.plot([], [], "--", color=BRANCH_COLOURS["global"], label="HSS (unstable)")


def _draw_diagram(ax, diagram, cycles, slow_index: int) -> None:
    """Continued branches, orbit envelopes and special points of the first slow species."""
    local_index = int(np.sum(diagram.slow[:slow_index]))
    for b in diagram.branches:
        if b.kind == "global":
            _draw_branch(ax, b.parameter, b.states[:, slow_index], b.stable, BRANCH_COLOURS["global"])
        else:
            _draw_branch(ax, b.parameter, b.local[:, local_index], b.stable, BRANCH_COLOURS["local"])
    for fam in cycles:
        i = slow_index if fam.branch == "global" else local_index
        for env in (fam.maxima[:, i], fam.minima[:, i]):
            _draw_branch(ax, fam.parameter, env, fam.stable, BRANCH_COLOURS["periodic"])
    points = list(diagram.points)
    for fam in cycles:
        i = slow_index if fam.branch == "global" else local_index
        for p in fam.folds:
            k = int(np.argmin(np.abs(fam.parameter - p)))
            ax.plot(p, fam.maxima[k, i], POINT_MARKERS["cycle-fold"], ms=5, mfc="white", mec=_POINT_EDGE, zorder=5)
    for pt in points:
        y = pt.state[slow_index] if pt.branch == "global" or pt.kind == "branch" else pt.local[local_index]
        ax.plot(pt.parameter, y, POINT_MARKERS.get(pt.kind, "*"), ms=5, mfc="white", mec=_POINT_EDGE, zorder=5)
    for name, colour in (("HSS", BRANCH_COLOURS["global"]), ("local state", BRANCH_COLOURS["local"])):
        ax.plot([], [], "-", color=colour, label=f"{name} (stable)")
        ax.plot([], [], "--", color=colour, label=f"{name} (unstable)")
    if cycles:
        ax.plot([], [], "-", color=BRANCH_COLOURS["periodic"], label="orbit max/min (stable)")
        ax.plot([], [], "--", color=BRANCH_COLOURS["periodic"], label="orbit max/min (unstable)")
    kinds = {pt.kind for pt in points} | ({"cycle-fold"} if any(f.folds for f in cycles) else set())
    for kind in ("fold", "hopf", "branch", "cycle-fold"):
        if kind in kinds:
            ax.plot([], [], POINT_MARKERS[kind], ms=5, mfc="white", mec=_POINT_EDGE, ls="none",
                    label=kind.replace("branch", "branch point"))


def plot_plane(case, model, points, diagram, boundaries, path: str) -> None:
    """The plane (sweep parameter, diffusion ratio ``max(D_slow) / min(D_fast)``): the linear (Turing)
    boundary on the unbounded line along the continued HSS, the region below it shaded (linearly unstable,
    well-mixed stable), the spike-limit boundaries (its limit as the ratio goes to 0) on the bottom edge, and
    the case's own ratio."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    from .continuation import critical_ratio_curve
    from .predict import _family

    p, ratio = critical_ratio_curve(_family(case, model), diagram.branches[0], near=[b.value for b in boundaries])
    own = next((pt.linear.ratio for pt in points if pt.linear is not None and pt.linear.ratio), None)
    floor = 1e-6 if not np.any(np.isfinite(ratio)) else min(1e-6, float(np.nanmin(ratio)) / 10)
    with rdcheck_style():
        fig, ax = plt.subplots()
        ax.set_yscale("log")
        colour = BRANCH_COLOURS["global"]
        ax.fill_between(p, floor, np.where(np.isfinite(ratio), ratio, floor), where=np.isfinite(ratio),
                        color=REGIME_SHADES["self-patterning"], lw=0, label="linearly (Turing) unstable")
        ax.plot(p, ratio, "-", color=colour, label="critical ratio (line)")
        for b in boundaries:
            ax.plot(b.value, floor, POINT_MARKERS.get(b.kind, "*"), ms=6, mfc="white", mec=_POINT_EDGE,
                    clip_on=False, zorder=5)
            ax.axvline(b.value, color=_POINT_EDGE, lw=0.6, ls=":", zorder=1)
        ax.plot([], [], "o", mfc="white", mec=_POINT_EDGE, ls="none", label="spike-limit boundary (ratio -> 0)")
        if own:
            ax.axhline(own, color=BRANCH_COLOURS["local"], lw=1.0, ls="--", label=f"case ratio {own:.3g}")
        ax.set_ylim(floor, 1.0)
        ax.set_xlim(float(np.min(p)), float(np.max(p)))
        ax.set_xlabel(case.sweep.parameter)
        ax.set_ylabel("max(D_slow) / min(D_fast)")
        ax.set_title(f"{model.name}: linear boundary and spike limit")
        ax.legend(loc="center left", bbox_to_anchor=(1.01, 0.5), fontsize=8)
        fig.savefig(path)
        plt.close(fig)


def _field_axes(ax, fig, result, values: np.ndarray, title: str) -> None:
    """One 2D field on its nodes: an image on uniform grids, a triangulated colour plot otherwise."""
    import matplotlib.tri as mtri

    x, y = result.coords[:, 0], result.coords[:, 1]
    tri = mtri.Triangulation(x, y)
    art = ax.tripcolor(tri, values, shading="gouraud", cmap=FIELD_MAP)
    ax.set_aspect("equal")
    ax.set_title(title)
    ax.set_axis_off()
    fig.colorbar(art, ax=ax, shrink=0.8)


def plot_simulation(path: str, model, result) -> None:
    """A space-time picture of every species (1D), or the final state of every species (2D)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    n = len(model.species)
    label = f"{model.name}, {result.start.label()}: {result.outcome.outcome}"
    with rdcheck_style():
        fig, axes = plt.subplots(1, n, figsize=(3.4 * n, 3.2), squeeze=False)
        for i, ax in enumerate(axes[0]):
            name = model.species[i]
            if result.dim == 1:
                x = result.coords[:, 0]
                order = np.argsort(x)
                t = result.run.snap_t
                field = result.run.snap_u[:, i, order]
                art = ax.pcolormesh(x[order], t, field, shading="nearest", cmap=FIELD_MAP)
                ax.set_xlabel("x")
                ax.set_ylabel("t" if i == 0 else "")
                ax.set_title(name)
                fig.colorbar(art, ax=ax, shrink=0.8)
            else:
                _field_axes(ax, fig, result, result.run.u[i], f"{name} at t = {result.run.t_final:.4g}")
        fig.suptitle(label, x=0.01, ha="left", fontsize=10, fontweight="bold")
        fig.savefig(path)
        plt.close(fig)
