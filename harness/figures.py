"""Figures in rdcheck's own style: stability by line style, branch kind by colour, regimes as shaded bands."""

from __future__ import annotations

from collections.abc import Sequence
from contextlib import contextmanager

import numpy as np

__all__ = ["BRANCH_COLOURS", "FIELD_MAP", "REGIME_SHADES", "plot_prediction", "plot_simulation", "rdcheck_style"]

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


def plot_prediction(case, model, points, path: str) -> None:
    """States of the first slow species against the sweep parameter, regimes shaded, saved to ``path``."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    slow_index = int(np.flatnonzero(model.slow)[0])
    local_index = 0
    x = np.array([p.value for p in points])
    with rdcheck_style():
        fig, ax = plt.subplots()
        _shade_regimes(ax, x, [p.regime for p in points])
        hss = np.array([p.hss[slow_index] if p.hss is not None else np.nan for p in points])
        hss_stable = np.array([bool(p.spike is not None and p.spike.spike_stable and p.spike.well_mixed_stable)
                               for p in points])
        _draw_branch(ax, x, hss, hss_stable, BRANCH_COLOURS["global"])
        for i, p in enumerate(points):
            if p.spike is None:
                continue
            for state in p.spike.local_states:
                marker = "o" if state.stable else "x"
                ax.plot(x[i], state.values[local_index], marker, ms=3.2, color=BRANCH_COLOURS["local"],
                        mfc=BRANCH_COLOURS["local"] if state.stable else "none")
        ax.plot([], [], "-", color=BRANCH_COLOURS["global"], label="HSS (stable)")
        ax.plot([], [], "--", color=BRANCH_COLOURS["global"], label="HSS (unstable)")
        ax.plot([], [], "o", ms=3.2, color=BRANCH_COLOURS["local"], label="local state (stable)")
        ax.plot([], [], "x", ms=3.2, color=BRANCH_COLOURS["local"], label="local state (unstable)")
        ax.set_xlabel(case.sweep.parameter)
        ax.set_ylabel(f"{model.species[slow_index]} (slow)")
        ax.set_title(f"{model.name}: spike-limit states and regimes")
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
