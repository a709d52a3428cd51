"""The HTML report: one self-contained file with the history figures, tables and provenance.

The page carries no scripts and loads nothing from elsewhere: figures are embedded as base64 PNG,
styles are inline, so the file can be mailed, archived or attached to a workflow report as is.
"""

from __future__ import annotations

import base64
import html
import json
import math
import os
import platform
from collections.abc import Iterable, Mapping, Sequence
from importlib import metadata
from pathlib import Path

import numpy as np
import pandas as pd

from ._atomic import atomic_write_bytes
from ._history import INCREMENT_FLAGS
from ._plots import plot_history

__all__ = ["write_report", "flag_warnings", "software_versions"]

_FIGURES = (
    ("angle_vs_saturation", "Effective contact angle against wetting saturation. Filled circles: "
     "energy-balance angle of each increment with its interval, plotted at the increment's mean "
     "S_w; open triangles: topological angle of each state; open squares: geometric median."),
    ("pc_vs_saturation", "Capillary pressure P_c = σκ (or the n–w curvature κ when no interfacial "
     "tension is configured) against wetting saturation."),
    ("a_nw_vs_saturation", "Specific fluid–fluid interfacial area against wetting saturation."),
    ("euler_vs_saturation", "Euler characteristic of the non-wetting phase against wetting "
     "saturation."),
    ("angle_vs_time", "Energy-balance and topological angles over time; tinted spans mark the "
     "branches."),
    ("events_vs_time", "Cluster events of the non-wetting phase per increment."),
    ("phase_slices", "Mid-plane slices of the first, a mid-path and the last state."),
)

_CSS = """
body{font-family:system-ui,-apple-system,"Segoe UI",Roboto,sans-serif;color:#1d2430;
margin:0;background:#f6f7f9;line-height:1.45}
main{max-width:1120px;margin:0 auto;padding:24px 28px 48px;background:#fff}
h1{font-size:1.55rem;margin:0 0 4px}h2{font-size:1.15rem;margin:28px 0 8px;
border-bottom:2px solid #1f5fa8;padding-bottom:3px}h3{font-size:1rem;margin:16px 0 6px}
p.lead{color:#4a5466;margin:0 0 12px}
table{border-collapse:collapse;font-size:.84rem;margin:6px 0 12px}
th,td{border:1px solid #d5d9e0;padding:3px 7px;text-align:right;vertical-align:top}
th{background:#eef1f5;font-weight:600}td.t,th.t{text-align:left}
tr.drainage td:first-child{border-left:4px solid #1f5fa8}
tr.imbibition td:first-child{border-left:4px solid #e07b1f}
.figs{display:grid;grid-template-columns:repeat(auto-fit,minmax(470px,1fr));gap:18px}
figure{margin:0;border:1px solid #e2e5ea;padding:8px;background:#fff}
figure.wide{grid-column:1/-1}figure img{max-width:100%;height:auto;display:block;margin:0 auto}
figcaption{font-size:.8rem;color:#4a5466;margin-top:4px}
ul.warn{background:#fff8e6;border:1px solid #f0d48a;padding:8px 8px 8px 28px;font-size:.86rem}
ul.warn li{margin:2px 0}p.ok{color:#1d6b3a}
pre{background:#f3f5f8;border:1px solid #e2e5ea;padding:8px;font-size:.8rem;overflow-x:auto}
details summary{cursor:pointer;font-weight:600;margin:8px 0}
.scroll{overflow-x:auto}
"""


def _esc(v) -> str:
    return html.escape(str(v), quote=True)


def _cell(v) -> str:
    """One table cell's text: numbers to four significant figures, missing values as a dash."""
    if v is None or v is pd.NA:
        return "–"
    if isinstance(v, bool | np.bool_):
        return "yes" if v else ""
    if isinstance(v, int | np.integer):
        return str(int(v))
    if isinstance(v, float | np.floating):
        if not math.isfinite(v):
            return "–"
        return f"{v:.4g}" if (v == 0 or 1e-3 <= abs(v) < 1e5) else f"{v:.3e}"
    if isinstance(v, Mapping | list | tuple):
        return json.dumps(v, default=str)
    return str(v)


def _table(df: pd.DataFrame, *, row_class: str | None = None) -> str:
    if df.empty:
        return "<p>(none)</p>"
    text_cols = {c for c in df.columns
                 if pd.api.types.is_object_dtype(df[c]) or pd.api.types.is_string_dtype(df[c])}
    head = "".join(f'<th class="{"t" if c in text_cols else ""}" title="{_esc(c)}">'
                   f"{_esc(_LABELS.get(c, c))}</th>" for c in df.columns)
    body = []
    for _, row in df.iterrows():
        cls = f' class="{_esc(row[row_class])}"' if row_class and row_class in df.columns else ""
        cells = "".join(f'<td class="{"t" if c in text_cols else ""}">{_esc(_cell(row[c]))}</td>'
                        for c in df.columns)
        body.append(f"<tr{cls}>{cells}</tr>")
    return (f'<div class="scroll"><table><thead><tr>{head}</tr></thead>'
            f'<tbody>{"".join(body)}</tbody></table></div>')


def _mapping_table(m: Mapping) -> str:
    return _table(pd.DataFrame({"key": [str(k) for k in m],
                                "value": [_cell(v) for v in m.values()]}))


def _provenance_html(provenance: Mapping) -> str:
    """Render a provenance mapping: nested mappings and lists of records become tables."""
    parts, scalars = [], {}
    for key, value in provenance.items():
        title = str(key).replace("_", " ")
        if isinstance(value, Mapping) and value:
            parts.append(f"<h3>{_esc(title)}</h3>{_mapping_table(value)}")
        elif (isinstance(value, list | tuple) and value
              and all(isinstance(v, Mapping) for v in value)):
            parts.append(f"<h3>{_esc(title)}</h3>{_table(pd.DataFrame(list(value)))}")
        else:
            scalars[key] = value
    if scalars:
        parts.insert(0, _mapping_table(scalars))
    return "".join(parts) or "<p>(none given)</p>"


def software_versions() -> dict[str, str]:
    """Versions of Python, wetpath and the libraries that shape the results."""
    out = {"python": platform.python_version(), "platform": platform.platform()}
    for name in ("wetpath", "numpy", "scipy", "scikit-image", "pandas", "numba", "zarr",
                 "dask", "matplotlib", "snakemake"):
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            if name == "wetpath":
                from . import __version__
                out[name] = f"{__version__} (not installed, source tree)"
    return out


def _raised(row: pd.Series) -> str:
    """The flags raised on one increment row, as short text ("" when none)."""
    return ", ".join(f.removeprefix("flag_").replace("_", " ") for f in INCREMENT_FLAGS
                     if f in row.index and pd.notna(row[f]) and bool(row[f]))


def flag_warnings(increments: pd.DataFrame) -> list[str]:
    """One line per increment with a raised flag or an undefined energy-balance angle."""
    out = []
    for _, r in increments.iterrows():
        name = f"increment {r.get('step_from', '?')}→{r.get('step_to', '?')}"
        raised = _raised(r)
        if raised:
            out.append(f"{name}: {raised}")
        theta = r.get("theta_energy_deg", np.nan)
        if pd.isna(theta) and not raised:
            out.append(f"{name}: energy-balance angle undefined")
    return out


def _figure_html(name: str, png: Path, caption: str) -> str:
    data = base64.b64encode(png.read_bytes()).decode("ascii")
    wide = ' class="wide"' if name == "phase_slices" else ""
    return (f'<figure{wide}><img src="data:image/png;base64,{data}" alt="{_esc(caption)}">'
            f"<figcaption>{_esc(caption)} (SVG: {_esc(png.with_suffix('.svg').name)})"
            "</figcaption></figure>")


_BRANCH_COLS = ["branch", "branch_kind", "step_first", "step_last", "saturation_w_start",
                "saturation_w_end", "n_used", "n_increments", "theta_energy_pooled_deg",
                "theta_energy_pooled_lo_deg", "theta_energy_pooled_hi_deg", "weighting",
                "theta_topo_median_deg", "hysteresis_deg", "hysteresis_lo_deg",
                "hysteresis_hi_deg", "hysteresis_vs_branch"]
# short column headers on the page; the table column name is the header's tooltip
_LABELS = {
    "branch_kind": "kind", "step_first": "from", "step_last": "to",
    "saturation_w_start": "S_w start", "saturation_w_end": "S_w end", "n_used": "used",
    "n_increments": "increments", "theta_energy_pooled_deg": "θ energy [°]",
    "theta_energy_pooled_lo_deg": "lo [°]", "theta_energy_pooled_hi_deg": "hi [°]",
    "theta_topo_median_deg": "θ topo median [°]", "hysteresis_deg": "hysteresis [°]",
    "hysteresis_lo_deg": "lo [°]", "hysteresis_hi_deg": "hi [°]", "hysteresis_vs_branch": "vs",
    "time_s": "t [s]", "saturation_w": "S_w", "porosity": "φ", "a_nw_per_um": "a_nw [1/µm]",
    "a_ws_per_um": "a_ws [1/µm]", "curvature_nw_per_um": "κ [1/µm]", "pc_pa": "P_c [Pa]",
    "euler_n": "χ_n", "contact_loops": "loops", "theta_topo_deg": "θ topo [°]",
    "theta_topo_lo_deg": "lo [°]", "theta_topo_hi_deg": "hi [°]",
    "theta_geom_median_deg": "θ geom median [°]", "step_from": "from", "step_to": "to",
    "theta_energy_deg": "θ energy [°]", "theta_energy_lo_deg": "lo [°]",
    "theta_energy_hi_deg": "hi [°]", "r_kappa": "R_κ", "n_coalesce": "coalesce",
    "n_breakup": "break-up", "n_appear": "appear", "n_vanish": "vanish",
}

_STATE_COLS = ["step", "time_s", "branch", "saturation_w", "porosity", "a_nw_per_um",
               "a_ws_per_um", "curvature_nw_per_um", "pc_pa", "euler_n", "contact_loops",
               "theta_topo_deg", "theta_topo_lo_deg", "theta_topo_hi_deg",
               "theta_geom_median_deg"]
_INCREMENT_COLS = ["step_from", "step_to", "time_s", "direction", "branch",
                   "theta_energy_deg", "theta_energy_lo_deg", "theta_energy_hi_deg", "r_kappa",
                   "flags", "n_coalesce", "n_breakup", "n_appear", "n_vanish"]


def _pick(df: pd.DataFrame, cols: Sequence[str]) -> pd.DataFrame:
    return df[[c for c in cols if c in df.columns]]


def _flag_text(rows: pd.DataFrame) -> pd.Series:
    """The raised flags of each increment row as one short text."""
    return rows.apply(_raised, axis=1) if len(rows) else pd.Series([], dtype=object)


def _deg(v, sign: str = "") -> str:
    return f"{v:{sign}.1f}°" if pd.notna(v) and math.isfinite(v) else "–"


def _headline(branches: pd.DataFrame) -> str:
    items = []
    for _, r in branches.iterrows():
        if r["branch_kind"] == "static":
            continue
        text = (f"branch {int(r['branch'])} ({_esc(r['branch_kind'])}), steps "
                f"{_esc(r['step_first'])}→{_esc(r['step_last'])}: θ = "
                f"{_deg(r['theta_energy_pooled_deg'])} "
                f"[{_deg(r['theta_energy_pooled_lo_deg'])}, "
                f"{_deg(r['theta_energy_pooled_hi_deg'])}]")
        if pd.notna(r.get("hysteresis_deg", np.nan)):
            text += (f"; hysteresis vs branch {_cell(r['hysteresis_vs_branch'])}: "
                     f"{_deg(r['hysteresis_deg'], '+')} [{_deg(r['hysteresis_lo_deg'], '+')}, "
                     f"{_deg(r['hysteresis_hi_deg'], '+')}]")
        items.append(f"<li>{text}</li>")
    return f"<ul>{''.join(items)}</ul>" if items else "<p>No moving branch.</p>"


def write_report(out_html: str | os.PathLike, *, history: pd.DataFrame, branches: pd.DataFrame,
                 states: pd.DataFrame, increments: pd.DataFrame, config: Mapping,
                 provenance: Mapping, warnings: Iterable[str] = (),
                 slices: Sequence[tuple[str, np.ndarray]] | None = None,
                 figures_dir: str | os.PathLike, title: str | None = None,
                 slice_axes: tuple[str, str] = ("y", "x")) -> Path:
    """Write the self-contained HTML report of one series.

    Parameters
    ----------
    out_html : path
        The report file; written to a temporary file beside it, then moved into place.
    history, branches : pandas.DataFrame
        Outputs of :func:`wetpath._history.build_history` and :func:`branch_summary`.
    states, increments : pandas.DataFrame
        The per-state and per-increment angle tables (their flags become warnings).
    config : mapping
        The configuration the series ran with (shown as JSON).
    provenance : mapping
        Input checksums, code and config hashes and the like; nested mappings and lists of records
        become tables. Software versions are added from the running interpreter.
    warnings : iterable of str
        Further warnings to list before the flagged increments.
    slices : sequence of (title, 2D array), optional
        Phase-code slices (e.g. the mid-plane of the first, a mid-path and the last state, from
        :func:`wetpath._plots.mid_plane_slices`).
    figures_dir : path
        Where the PNG and SVG figures are written (the PNGs are embedded in the report).
    title : str, optional
        Page title; defaults to the ``series`` or ``name`` entry of ``config``.
    slice_axes : (str, str), default ("y", "x")
        Names of the slices' row and column axes (("y", "x") for z planes).

    Returns
    -------
    Path
        The report path.
    """
    voxel = states["voxel_size_um"].dropna() if "voxel_size_um" in states.columns else []
    figs = plot_history(history, figures_dir, slices=slices, slice_axes=slice_axes,
                        voxel_size_um=float(voxel.iloc[0]) if len(voxel) else None)
    title = title or str(config.get("series") or config.get("name") or "saturation path")
    all_warnings = [*map(str, warnings), *flag_warnings(increments)]
    warn_html = (f'<ul class="warn">{"".join(f"<li>{_esc(w)}</li>" for w in all_warnings)}</ul>'
                 if all_warnings else '<p class="ok">No warnings.</p>')
    fig_html = "".join(_figure_html(name, figs[name][0], caption)
                       for name, caption in _FIGURES if name in figs)
    states_rows = history[history["record"] == "state"]
    inc_rows = history[history["record"] == "increment"].copy()
    inc_rows["flags"] = _flag_text(inc_rows)
    versions = {**software_versions(), **dict(provenance.get("versions", {}) or {})}
    prov = {k: v for k, v in provenance.items() if k != "versions"}
    page = f"""<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>wetpath report: {_esc(title)}</title><style>{_CSS}</style></head>
<body><main>
<h1>Effective wettability along the saturation path</h1>
<p class="lead">Series <b>{_esc(title)}</b>: {len(states_rows)} states, {len(inc_rows)}
increments, {len(branches)} branch(es). Angles in degrees, measured through the wetting phase.</p>
<h2>Branch summary</h2>
{_headline(branches)}
{_table(_pick(branches, _BRANCH_COLS), row_class="branch_kind")}
<p class="lead">Pooled angle: weighted least-squares fit of Δa_nw + κ̄ φΔS_w = cos θ · Δa_ws
through the origin over the increments of each branch (Blunt et al. 2019), percentile bootstrap
interval over increments; hysteresis = θ(imbibition) − θ(drainage) between adjacent branches of
opposite kind.</p>
<h2>Warnings</h2>
{warn_html}
<h2>Figures</h2>
<div class="figs">{fig_html}</div>
<h2>History</h2>
<details open><summary>States ({len(states_rows)})</summary>
{_table(_pick(states_rows, _STATE_COLS))}</details>
<details open><summary>Increments ({len(inc_rows)})</summary>
{_table(_pick(inc_rows, _INCREMENT_COLS))}</details>
<h2>Configuration</h2>
<pre>{_esc(json.dumps(dict(config), indent=2, sort_keys=True, default=str))}</pre>
<h2>Provenance</h2>
{_provenance_html(prov)}
<h3>software versions</h3>
{_mapping_table(versions)}
<p class="lead">References: Blunt, Lin, Akai &amp; Bijeljic (2019), J. Colloid Interface Sci. 552,
59–65 (energy balance); Sun et al. (2020), Geophys. Res. Lett. 47, e2019GL086151 and Blunt, Akai
&amp; Bijeljic (2020), J. Colloid Interface Sci. 576, 99–108 (topological angle); AlRatrout et al.
(2017), Adv. Water Resour. 109, 158–169 (geometric angle).</p>
</main></body></html>
"""
    return atomic_write_bytes(out_html, page.encode("utf-8"))
