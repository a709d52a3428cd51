"""Figures of the saturation-path history, written as PNG and SVG (matplotlib, Agg canvas).

Every function takes a history table from :func:`wetpath._history.build_history` (or 2D label
slices) and an output stem, writes ``<stem>.png`` and ``<stem>.svg`` and returns the two paths.
Branches are told apart by colour (drainage / imbibition), line style (branch number) and a legend
entry each; estimators by marker shape, so the figures read without colour too. The palette is our
own: a dark blue / orange pair for the branches, five colours of spread lightness (plus hatches)
for cluster events, grey (solid), blue (wetting) and amber (non-wetting) for phases; each set stays
apart under simulated protanopia, deuteranopia and tritanopia (tested in ``tests/test_plots.py``).

Figures are built on :class:`matplotlib.figure.Figure` with the Agg canvas, never through pyplot,
so they are thread-safe and need no display.
"""

from __future__ import annotations

import os
from collections.abc import Sequence
from pathlib import Path

import matplotlib
import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import ListedColormap
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.ticker import MaxNLocator

from ._atomic import temporary_sibling
from ._errors import WetpathError

__all__ = [
    "BRANCH_COLOURS", "PHASE_COLOURS", "plot_angle_vs_saturation", "plot_pc_vs_saturation",
    "plot_area_vs_saturation", "plot_euler_vs_saturation", "plot_angle_vs_time",
    "plot_events_vs_time", "plot_phase_slices", "plot_history", "mid_plane_slices",
]

BRANCH_COLOURS = {"drainage": "#1f5fa8", "imbibition": "#e07b1f", "static": "#5b5b5b"}
EVENT_COLOURS = {"n_coalesce": "#1f5fa8", "n_breakup": "#e07b1f", "n_regroup": "#a8d8f5",
                 "n_appear": "#231030", "n_vanish": "#f7e98a"}
EVENT_HATCHES = {"n_coalesce": "", "n_breakup": "//", "n_regroup": "..", "n_appear": "xx",
                 "n_vanish": "\\\\"}
PHASE_COLOURS = ("#ffffff", "#7a7a7a", "#4a90d9", "#f0b03c")  # excluded, solid, w, n
PHASE_NAMES = ("excluded", "solid", "wetting", "non-wetting")
LINE_STYLES = ("-", "--", ":", "-.")
MARKERS = {"energy": "o", "topological": "^", "geometric": "s"}

_RC = {"font.size": 10, "axes.grid": True, "grid.alpha": 0.3, "axes.spines.top": False,
       "axes.spines.right": False, "svg.hashsalt": "wetpath", "svg.fonttype": "none",
       "legend.frameon": False}


def _new_figure(width=6.4, height=4.2) -> Figure:
    fig = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _save(fig: Figure, out_stem: str | os.PathLike) -> list[Path]:
    stem = Path(out_stem)
    stem.parent.mkdir(parents=True, exist_ok=True)
    paths = [stem.with_name(stem.name + ".png"), stem.with_name(stem.name + ".svg")]
    # temporary name + rename: a figure killed mid-write never sits under its final name
    for path, kwargs in zip(paths, ({"dpi": 130}, {"metadata": {"Date": None}}), strict=True):
        tmp = temporary_sibling(path)
        try:
            fig.savefig(tmp, format=path.suffix[1:], **kwargs)
            os.replace(tmp, path)
        finally:
            tmp.unlink(missing_ok=True)
    return paths


def _plotting(func):
    """Run a plotting function under the project's rc settings."""
    def wrapper(*args, **kwargs):
        with matplotlib.rc_context(_RC):
            return func(*args, **kwargs)
    wrapper.__name__, wrapper.__doc__ = func.__name__, func.__doc__
    wrapper.__wrapped__ = func
    return wrapper


def _rows(history: pd.DataFrame, record: str) -> pd.DataFrame:
    if "record" not in history.columns:
        raise WetpathError("history table lacks column record", step="plots")
    return history[history["record"] == record]


def _values(table: pd.DataFrame, name: str) -> np.ndarray:
    if name not in table.columns:
        return np.full(len(table), np.nan)
    return pd.to_numeric(table[name], errors="coerce").to_numpy(dtype=float)


def _branches(history: pd.DataFrame) -> list[tuple[int, str]]:
    pairs = history[["branch", "branch_kind"]].drop_duplicates("branch")
    return [(int(b), str(k)) for b, k in pairs.itertuples(index=False)]


def _style(branch: int, kind: str) -> dict:
    return {"color": BRANCH_COLOURS.get(kind, BRANCH_COLOURS["static"]),
            "linestyle": LINE_STYLES[(branch - 1) % len(LINE_STYLES)]}


def _branch_states(history: pd.DataFrame, branch: int) -> pd.DataFrame:
    """State rows of a branch, including the state it starts from, so branch lines join up."""
    states = _rows(history, "state")
    inc = _rows(history, "increment")
    inc = inc[inc["branch"] == branch]
    if inc.empty:
        return states[states["branch"] == branch]
    steps = set(inc["step_from"]) | set(inc["step_to"])
    return states[states["step"].isin(steps)]


def _branch_handles(history: pd.DataFrame) -> list[Line2D]:
    return [Line2D([], [], **_style(b, k), label=f"branch {b}: {k}")
            for b, k in _branches(history)]


_ESTIMATOR_LABELS = {"energy": "energy balance (per increment)",
                     "topological": "topological (per state)",
                     "geometric": "geometric median (per state)"}


def _angle_legend(fig: Figure, ax, history: pd.DataFrame, drawn: set[str]) -> None:
    """Legend below the axes: the branches, then the estimators actually drawn."""
    if not drawn:
        _no_data(ax, "contact angle")
    handles = _branch_handles(history) + [
        Line2D([], [], color="black", marker=MARKERS[name], linestyle="none",
               mfc="black" if name == "energy" else "white", label=label)
        for name, label in _ESTIMATOR_LABELS.items() if name in drawn]
    fig.legend(handles=handles, loc="outside lower center", ncols=3, fontsize=8)


def _no_data(ax, what: str) -> None:
    ax.text(0.5, 0.5, f"no {what} in this series", ha="center", va="center",
            transform=ax.transAxes, color="#5b5b5b")


def _state_curve(history: pd.DataFrame, column: str, out_stem, ylabel: str, title: str,
                 *, scale: float = 1.0) -> list[Path]:
    fig = _new_figure()
    ax = fig.add_subplot()
    drawn = False
    for b, kind in _branches(history):
        st = _branch_states(history, b)
        y = _values(st, column) * scale
        if np.isfinite(y).any():
            ax.plot(_values(st, "saturation_w"), y, marker="o", markersize=4, **_style(b, kind))
            drawn = True
    if drawn:
        ax.legend(handles=_branch_handles(history), loc="best", fontsize=8)
    else:
        _no_data(ax, ylabel.split(" [")[0])
    ax.set_xlabel("wetting saturation S_w [–]")
    ax.set_ylabel(ylabel)
    ax.set_title(title)
    return _save(fig, out_stem)


@_plotting
def plot_angle_vs_saturation(history: pd.DataFrame, out_stem: str | os.PathLike) -> list[Path]:
    """Effective contact angle against S_w: energy-balance angle of each increment (circles, with
    its interval, at the mean S_w of the increment), topological angle of each state (triangles,
    with its interval) and the geometric median (squares) when present; one colour and line
    style per branch. Returns the PNG and SVG paths."""
    fig = _new_figure(6.8, 5.0)
    ax = fig.add_subplot()
    inc = _rows(history, "increment")
    drawn: set[str] = set()
    for b, kind in _branches(history):
        st = _style(b, kind)
        rows = inc[inc["branch"] == b]
        x, y = _values(rows, "saturation_w"), _values(rows, "theta_energy_deg")
        ok = np.isfinite(x) & np.isfinite(y)
        if ok.any():
            lo, hi = _values(rows, "theta_energy_lo_deg"), _values(rows, "theta_energy_hi_deg")
            err = np.vstack([np.where(np.isfinite(lo), y - lo, 0), np.where(np.isfinite(hi),
                                                                          hi - y, 0)])
            ax.errorbar(x[ok], y[ok], yerr=err[:, ok], marker=MARKERS["energy"], markersize=5,
                        capsize=2, elinewidth=0.8, **st)
            drawn.add("energy")
        rows = _rows(history, "state")
        rows = rows[rows["branch"] == b]  # markers only: each state drawn once
        x = _values(rows, "saturation_w")
        for name, col in (("topological", "theta_topo_deg"),
                          ("geometric", "theta_geom_median_deg")):
            y = _values(rows, col)
            ok = np.isfinite(x) & np.isfinite(y)
            if not ok.any():
                continue
            kw = {"yerr": None}
            if name == "topological":
                lo, hi = _values(rows, "theta_topo_lo_deg"), _values(rows, "theta_topo_hi_deg")
                if np.isfinite(lo[ok]).all() and np.isfinite(hi[ok]).all():
                    kw["yerr"] = np.vstack([y - lo, hi - y])[:, ok]
            ax.errorbar(x[ok], y[ok], marker=MARKERS[name], markersize=5, mfc="white",
                        capsize=2, elinewidth=0.8, color=st["color"], linestyle="none", **kw)
            drawn.add(name)
    _angle_legend(fig, ax, history, drawn)
    ax.set_xlabel("wetting saturation S_w [–]")
    ax.set_ylabel("effective contact angle θ_w [°]")
    ax.set_title("Effective contact angle along the saturation path")
    return _save(fig, out_stem)


@_plotting
def plot_pc_vs_saturation(history: pd.DataFrame, out_stem: str | os.PathLike) -> list[Path]:
    """Capillary pressure P_c = σκ [kPa] against S_w when an interfacial tension was given, else
    the n–w total curvature κ [1/µm]. Returns the PNG and SVG paths."""
    if np.isfinite(_values(_rows(history, "state"), "pc_pa")).any():
        return _state_curve(history, "pc_pa", out_stem, "capillary pressure P_c [kPa]",
                            "Capillary pressure P_c = σκ", scale=1e-3)
    return _state_curve(history, "curvature_nw_per_um", out_stem,
                        "n–w total curvature κ [1/µm]", "Interface curvature (P_c = σκ)")


@_plotting
def plot_area_vs_saturation(history: pd.DataFrame, out_stem: str | os.PathLike) -> list[Path]:
    """Specific n–w interfacial area a_nw [1/µm] against S_w. Returns the PNG and SVG paths."""
    return _state_curve(history, "a_nw_per_um", out_stem,
                        "specific n–w area a_nw [1/µm]", "Fluid–fluid interfacial area")


@_plotting
def plot_euler_vs_saturation(history: pd.DataFrame, out_stem: str | os.PathLike) -> list[Path]:
    """Euler characteristic χ_n of the non-wetting phase against S_w. Returns the PNG and SVG
    paths."""
    return _state_curve(history, "euler_n", out_stem, "Euler characteristic χ_n [–]",
                        "Topology of the non-wetting phase")


def _shade_branches(ax, history: pd.DataFrame) -> None:
    """Tint the time span of each branch with its colour."""
    inc = _rows(history, "increment")
    sta = _rows(history, "state")
    t_state = dict(zip(sta["step"], _values(sta, "time_s"), strict=True))
    for b, kind in _branches(history):
        rows = inc[inc["branch"] == b]
        if rows.empty:
            continue
        t0, t1 = t_state.get(rows["step_from"].iloc[0]), _values(rows, "time_s")[-1]
        if t0 is not None and np.isfinite(t0) and np.isfinite(t1):
            ax.axvspan(t0, t1, color=_style(b, kind)["color"], alpha=0.08, linewidth=0)


@_plotting
def plot_angle_vs_time(history: pd.DataFrame, out_stem: str | os.PathLike) -> list[Path]:
    """Energy-balance angle of each increment (at the time of its end state) and topological
    angle of each state against time [s], branch spans tinted. Returns the PNG and SVG paths."""
    fig = _new_figure(6.8, 4.6)
    ax = fig.add_subplot()
    _shade_branches(ax, history)
    drawn: set[str] = set()
    for b, kind in _branches(history):
        st = _style(b, kind)
        rows = history[history["branch"] == b]
        for record, col, name in (("increment", "theta_energy_deg", "energy"),
                                  ("state", "theta_topo_deg", "topological")):
            r = rows[rows["record"] == record]
            t, y = _values(r, "time_s"), _values(r, col)
            ok = np.isfinite(t) & np.isfinite(y)
            if ok.any():
                ax.plot(t[ok], y[ok], marker=MARKERS[name], markersize=5,
                        mfc=st["color"] if record == "increment" else "white",
                        **(st if record == "increment" else {**st, "linestyle": "none"}))
                drawn.add(name)
    _angle_legend(fig, ax, history, drawn)
    ax.set_xlabel("time [s]")
    ax.set_ylabel("effective contact angle θ_w [°]")
    ax.set_title("Effective contact angle over time")
    return _save(fig, out_stem)


@_plotting
def plot_events_vs_time(history: pd.DataFrame, out_stem: str | os.PathLike) -> list[Path]:
    """Displacement events per increment (coalescence, break-up, regrouping, appearance,
    disappearance of n clusters) as stacked bars against the time of the increment's end [s].
    Returns the PNG and SVG paths."""
    fig = _new_figure(6.8, 4.0)
    ax = fig.add_subplot()
    inc = _rows(history, "increment")
    t = _values(inc, "time_s")
    width = 0.7 * float(np.nanmin(np.diff(np.unique(t[np.isfinite(t)])))) \
        if np.isfinite(t).sum() > 1 else 1.0
    bottom = np.zeros(len(inc))
    labels = {"n_coalesce": "coalescence", "n_breakup": "break-up", "n_regroup": "regrouping",
              "n_appear": "appearance", "n_vanish": "disappearance"}
    drawn = False
    for col, label in labels.items():
        v = np.nan_to_num(_values(inc, col))
        ok = np.isfinite(t)
        if ok.any() and v.any():
            ax.bar(t[ok], v[ok], width=width, bottom=bottom[ok], color=EVENT_COLOURS[col],
                   hatch=EVENT_HATCHES[col], edgecolor="#8a8a8a", linewidth=0.5, label=label)
            drawn = True
        bottom += v
    if drawn:
        ax.legend(loc="best", fontsize=8)
    else:
        _no_data(ax, "cluster event")
    ax.set_xlabel("time at end of increment [s]")
    ax.set_ylabel("events per increment [count]")
    ax.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax.set_title("Non-wetting cluster events")
    return _save(fig, out_stem)


@_plotting
def plot_phase_slices(slices: Sequence[tuple[str, np.ndarray]], out_stem: str | os.PathLike, *,
                      voxel_size_um: float | None = None,
                      axis_labels: tuple[str, str] = ("y", "x")) -> list[Path]:
    """Side-by-side 2D slices of label volumes with the phases in fixed colours.

    Parameters
    ----------
    slices : sequence of (title, 2D array)
        Canonical phase codes (0 excluded, 1 solid, 2 wetting, 3 non-wetting), e.g. the mid-plane
        z slice of the first, a mid-path and the last state.
    out_stem : path
        Output path without suffix.
    voxel_size_um : float, optional
        Voxel size (µm); axes are in µm when given, else in voxels.
    axis_labels : (str, str), default ("y", "x")
        Names of the slice's row and column axes (("y", "x") for a z plane).

    Returns
    -------
    list of Path
        The PNG and SVG paths.
    """
    if not slices:
        raise WetpathError("no slices to plot", step="plots")
    fig = _new_figure(3.2 * len(slices) + 0.4, 3.9)
    axes = fig.subplots(1, len(slices), squeeze=False)[0]
    cmap = ListedColormap(PHASE_COLOURS)
    unit = "µm" if voxel_size_um else "voxel"
    h = float(voxel_size_um or 1.0)
    for ax, (title, image) in zip(axes, slices, strict=True):
        image = np.asarray(image)
        if image.ndim != 2:
            raise WetpathError(f"slice {title!r} is not 2D (shape {image.shape})", step="plots")
        if image.size and (image.min() < 0 or image.max() > 3):
            raise WetpathError(f"slice {title!r} holds values outside the phase codes 0–3",
                               step="plots")
        ax.imshow(image, cmap=cmap, vmin=-0.5, vmax=3.5, interpolation="nearest",
                  extent=(0, image.shape[1] * h, image.shape[0] * h, 0))
        ax.set_title(title, fontsize=9)
        ax.set_xlabel(f"{axis_labels[1]} [{unit}]")
        ax.grid(False)
    axes[0].set_ylabel(f"{axis_labels[0]} [{unit}]")
    fig.legend(handles=[Patch(facecolor=c, edgecolor="#333333", label=n)
                        for c, n in zip(PHASE_COLOURS, PHASE_NAMES, strict=True)],
               loc="outside lower center", ncols=4, fontsize=8)
    return _save(fig, out_stem)


_AXIS_NAMES = ("z", "y", "x")


def mid_plane_slices(volumes: Sequence[tuple[str, np.ndarray]], *, axis: int = 0,
                     ) -> tuple[list[tuple[str, np.ndarray]], tuple[str, str]]:
    """Middle planes of label volumes across ``axis`` (0 = z) for :func:`plot_phase_slices`.

    Parameters
    ----------
    volumes : sequence of (title, 3D array)
        Label volumes (z, y, x), e.g. the first, a mid-path and the last state.
    axis : int, default 0
        The axis the planes are normal to.

    Returns
    -------
    (slices, axis_labels)
        The (title, 2D array) pairs and the names of the rows and columns of the planes
        (("y", "x") for axis 0).
    """
    out = []
    for title, volume in volumes:
        volume = np.asarray(volume)
        if volume.ndim != 3:
            raise WetpathError(f"volume {title!r} is not 3D (shape {volume.shape})", step="plots")
        out.append((title, np.take(volume, volume.shape[axis] // 2, axis=axis)))
    rest = [name for k, name in enumerate(_AXIS_NAMES) if k != axis]
    return out, (rest[0], rest[1])


PLOTS = {
    "angle_vs_saturation": plot_angle_vs_saturation,
    "pc_vs_saturation": plot_pc_vs_saturation,
    "a_nw_vs_saturation": plot_area_vs_saturation,
    "euler_vs_saturation": plot_euler_vs_saturation,
    "angle_vs_time": plot_angle_vs_time,
    "events_vs_time": plot_events_vs_time,
}


def plot_history(history: pd.DataFrame, out_dir: str | os.PathLike, *,
                 slices: Sequence[tuple[str, np.ndarray]] | None = None,
                 voxel_size_um: float | None = None,
                 slice_axes: tuple[str, str] = ("y", "x")) -> dict[str, list[Path]]:
    """Write every history figure (and the phase slices when given) into ``out_dir``.

    ``slices``, ``voxel_size_um`` and ``slice_axes`` go to :func:`plot_phase_slices` (as its
    ``axis_labels``).

    Returns a mapping from figure name (``angle_vs_saturation``, ``pc_vs_saturation``,
    ``a_nw_vs_saturation``, ``euler_vs_saturation``, ``angle_vs_time``, ``events_vs_time``,
    ``phase_slices``) to its PNG and SVG paths.
    """
    out = Path(out_dir)
    written = {name: func(history, out / name) for name, func in PLOTS.items()}
    if slices:
        written["phase_slices"] = plot_phase_slices(slices, out / "phase_slices",
                                                    voxel_size_um=voxel_size_um,
                                                    axis_labels=slice_axes)
    return written
