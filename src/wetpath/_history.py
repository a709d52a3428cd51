"""Saturation-path history: drainage / imbibition branches, pooled branch angles, hysteresis.

The history joins the per-state table (``angles/states.csv``) and the per-increment table
(``angles/increments.csv``) into one time-ordered table whose columns carry their units, labels
every increment drainage (S_w falls), imbibition (S_w rises) or static (|ΔS_w| below a tolerance),
and numbers the branches: a reversal of direction starts a new branch, so primary drainage,
imbibition and later scanning branches are told apart. The branch summary pools the energy balance
over each branch.

References
----------
Blunt, M. J., Lin, Q., Akai, T. & Bijeljic, B. (2019). A thermodynamically consistent
characterization of wettability in porous media using high-resolution imaging.
*J. Colloid Interface Sci.* 552, 59–65.
Efron, B. & Tibshirani, R. J. (1993). *An Introduction to the Bootstrap*. Chapman & Hall (percentile
intervals, ch. 13).
"""

from __future__ import annotations

import math
import os
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pandas as pd

from ._atomic import atomic_write_bytes
from ._errors import WetpathError

__all__ = [
    "assign_branches", "build_history", "branch_summary", "format_branch_summary",
    "write_history_tables",
]

DRAINAGE, IMBIBITION, STATIC = "drainage", "imbibition", "static"

# states-table column -> history column (units in the name; lengths in µm)
_STATE_COLUMNS = {
    "porosity": "porosity",
    "saturation_w": "saturation_w",
    "a_nw": "a_nw_per_um",
    "a_ws": "a_ws_per_um",
    "a_ns": "a_ns_per_um",
    "curvature_nw": "curvature_nw_per_um",
    "curvature_nw_std": "curvature_nw_std_per_um",
    "euler_n": "euler_n",
    "contact_loops": "contact_loops",
    "contact_length": "contact_length_um",
    "theta_topo_deg": "theta_topo_deg",
    "theta_topo_lo_deg": "theta_topo_lo_deg",
    "theta_topo_hi_deg": "theta_topo_hi_deg",
    "clusters_used": "clusters_used",
    "theta_geom_median_deg": "theta_geom_median_deg",
    "theta_geom_q25_deg": "theta_geom_q25_deg",
    "theta_geom_q75_deg": "theta_geom_q75_deg",
    "theta_geom_count": "theta_geom_count",
    "voxel_size_um": "voxel_size_um",
}

INCREMENT_FLAGS = (
    "flag_no_wetted_area_change", "flag_mixed_direction", "flag_large_step",
    "flag_volume_not_conserved",
)
EVENT_COLUMNS = ("n_continue", "n_coalesce", "n_breakup", "n_regroup", "n_appear", "n_vanish")

# increments-table column -> history column
_INCREMENT_COLUMNS = {
    "theta_energy_deg": "theta_energy_deg",
    "theta_energy_lo_deg": "theta_energy_lo_deg",
    "theta_energy_hi_deg": "theta_energy_hi_deg",
    "cos_theta_energy": "cos_theta_energy",
    "r_kappa": "r_kappa",
    "d_a_nw": "d_a_nw_per_um",
    "d_a_ws": "d_a_ws_per_um",
    "d_phi_sw": "d_phi_sw",
    "kappa_mean": "kappa_mean_per_um",
    **{f: f for f in INCREMENT_FLAGS},
    **{e: e for e in EVENT_COLUMNS},
}

HISTORY_FILES = {"history_csv": "history.csv", "history_parquet": "history.parquet",
                 "branches_csv": "branches.csv"}


def assign_branches(saturation_w: Sequence[float] | np.ndarray, *,
                    static_tol: float = 0.005) -> pd.DataFrame:
    """Label each increment of a saturation path and number the branches.

    Parameters
    ----------
    saturation_w : sequence of float, length n ≥ 1
        Wetting saturation S_w (fraction of pore volume, 0–1) of the states, in time order.
    static_tol : float, default 0.005
        An increment with |ΔS_w| < ``static_tol`` (saturation fraction) is static.

    Returns
    -------
    pandas.DataFrame
        n − 1 rows, one per increment t → t+1, columns ``increment`` (t), ``d_saturation_w``,
        ``direction`` (drainage when S_w falls, imbibition when it rises, static), ``branch``
        (1, 2, ...) and ``branch_kind`` (drainage / imbibition; static only when the whole path is
        static). A reversal (a moving increment opposite to the current branch) starts a new branch;
        static increments do not break a branch and belong to the branch they occur in; static
        increments before the first moving one belong to branch 1. An increment whose ΔS_w is NaN is
        static (it cannot reverse a branch).

    Examples
    --------
    >>> assign_branches([0.9, 0.7, 0.5, 0.6]).direction.tolist()
    ['drainage', 'drainage', 'imbibition']
    """
    s = np.asarray(saturation_w, dtype=float).ravel()
    if static_tol < 0 or not math.isfinite(static_tol):
        raise WetpathError(f"static_tol must be a finite number >= 0, got {static_tol}",
                           step="history")
    d = np.diff(s)
    direction = np.full(d.shape, STATIC, dtype=object)
    moving = np.isfinite(d) & (np.abs(d) >= static_tol)
    direction[moving & (d < 0)] = DRAINAGE
    direction[moving & (d > 0)] = IMBIBITION

    branch = np.zeros(d.shape, dtype=np.int64)
    kinds: list[str] = []
    for i, kind in enumerate(direction):
        if kind != STATIC and (not kinds or kinds[-1] != kind):
            kinds.append(kind)
        branch[i] = max(len(kinds), 1)
    if not kinds:
        kinds.append(STATIC)
    branch_kind = np.array([kinds[b - 1] for b in branch], dtype=object)
    return pd.DataFrame({"increment": np.arange(d.size, dtype=np.int64), "d_saturation_w": d,
                         "direction": direction, "branch": branch, "branch_kind": branch_kind})


def _column(table: pd.DataFrame, name: str, n: int) -> np.ndarray:
    """A column as an array, NaN when the optional column is missing."""
    if name in table.columns:
        return table[name].to_numpy()
    return np.full(n, np.nan)


def build_history(states: pd.DataFrame, increments: pd.DataFrame, *,
                  sigma_n_per_m: float | None = None, static_tol: float = 0.005) -> pd.DataFrame:
    """Join states and increments into one time-ordered table with branches.

    Parameters
    ----------
    states : pandas.DataFrame
        One row per step in time order: ``step``, ``saturation_w`` (required), ``time_s``,
        ``porosity``, ``a_nw``, ``a_ws``, ``a_ns`` (1/µm), ``curvature_nw``, ``curvature_nw_std``
        (1/µm), ``euler_n``, ``contact_loops``, ``contact_length`` (µm), the topological and
        geometric angle columns (degrees) and ``voxel_size_um``. Missing optional columns become
        NaN.
    increments : pandas.DataFrame
        One row per increment: ``step_from``, ``step_to`` (required), the energy-balance columns
        (``theta_energy_deg`` ..., ``d_a_nw``, ``d_a_ws`` (1/µm), ``d_phi_sw`` (= φ ΔS_w),
        ``kappa_mean`` (1/µm)), the ``flag_*`` columns and the event counts ``n_*``.
    sigma_n_per_m : float, optional
        n–w interfacial tension σ (N/m). When given, ``pc_pa`` = σ κ (Pa) with κ converted from 1/µm
        to 1/m (× 10⁶); otherwise ``pc_pa`` is NaN.
    static_tol : float, default 0.005
        Passed to :func:`assign_branches`.

    Returns
    -------
    pandas.DataFrame
        Rows in time order: state 0, increment 0→1, state 1, increment 1→2, ... Column ``record``
        is ``state`` or ``increment``. State rows carry the state measures (``a_nw_per_um``,
        ``curvature_nw_per_um``, ``pc_pa``, ``euler_n``, ``theta_topo_deg`` ...); increment rows
        carry the energy-balance columns, flags and event counts, ``saturation_w_from`` /
        ``saturation_w_to`` and, for plotting against S_w, ``saturation_w`` = their mean and
        ``pc_pa`` = σ κ̄. ``direction`` (increments only), ``branch`` and ``branch_kind`` come from
        :func:`assign_branches` on the states' S_w; a state row takes the branch of the increment
        ending at it (the first state that of the first increment). ``step`` is the state's step on
        state rows and ``step_to`` on increment rows; ``time_s`` likewise.

    Raises
    ------
    WetpathError
        If a required column is missing, steps repeat, or an increment names a step that is not a
        state or does not join consecutive states.

    References
    ----------
    Young–Laplace, P_c = σ κ with κ = k1 + k2 (de Gennes, Brochard-Wyart & Quéré 2004, *Capillarity
    and Wetting Phenomena*, ch. 1).
    """
    for name, table, cols in (("states", states, ("step", "saturation_w")),
                              ("increments", increments, ("step_from", "step_to"))):
        missing = [c for c in cols if c not in table.columns]
        if missing:
            raise WetpathError(f"{name} table lacks required column(s) {', '.join(missing)}",
                               step="history")
    n = len(states)
    if n == 0:
        raise WetpathError("states table is empty", step="history")
    steps = states["step"].tolist()
    if len(set(steps)) != n:
        raise WetpathError("states table repeats a step", step="history")
    position = {s: i for i, s in enumerate(steps)}

    sw = states["saturation_w"].to_numpy(dtype=float)
    br = assign_branches(sw, static_tol=static_tol)
    scale = np.nan if sigma_n_per_m is None else float(sigma_n_per_m) * 1e6  # N/m · 1/µm → Pa

    st = pd.DataFrame({"record": "state", "order": 2 * np.arange(n), "step": steps,
                       "time_s": _column(states, "time_s", n).astype(float)})
    for src, dst in _STATE_COLUMNS.items():
        st[dst] = _column(states, src, n)
    st["pc_pa"] = scale * st["curvature_nw_per_um"].astype(float)
    if n > 1:
        first = br["branch"].iloc[0]
        st["branch"] = np.concatenate([[first], br["branch"].to_numpy()])
        st["branch_kind"] = np.concatenate([[br["branch_kind"].iloc[0]],
                                            br["branch_kind"].to_numpy()])
    else:
        st["branch"], st["branch_kind"] = 1, STATIC

    m = len(increments)
    i_from = np.empty(m, dtype=np.int64)
    for k, (a, b) in enumerate(zip(increments["step_from"], increments["step_to"], strict=True)):
        if a not in position or b not in position:
            raise WetpathError(f"increment {a}->{b} names a step missing from the states table",
                               step="history")
        if position[b] != position[a] + 1:
            raise WetpathError(f"increment {a}->{b} does not join consecutive states",
                               step="history")
        i_from[k] = position[a]
    inc = pd.DataFrame({"record": "increment", "order": 2 * i_from + 1,
                        "step": increments["step_to"].to_numpy(),
                        "step_from": increments["step_from"].to_numpy(),
                        "step_to": increments["step_to"].to_numpy()})
    time_to = st["time_s"].to_numpy()[np.minimum(i_from + 1, n - 1)]
    inc["time_s"] = (increments["time_s"].to_numpy(dtype=float)
                     if "time_s" in increments.columns else time_to)
    inc["saturation_w_from"] = sw[i_from]
    inc["saturation_w_to"] = sw[np.minimum(i_from + 1, n - 1)]
    inc["saturation_w"] = 0.5 * (inc["saturation_w_from"] + inc["saturation_w_to"])
    inc["porosity"] = _column(increments, "porosity", m)
    for src, dst in _INCREMENT_COLUMNS.items():
        inc[dst] = _column(increments, src, m)
    inc["pc_pa"] = scale * inc["kappa_mean_per_um"].astype(float)
    inc["voxel_size_um"] = st["voxel_size_um"].to_numpy()[i_from]
    for col in ("direction", "branch", "branch_kind"):
        inc[col] = br[col].to_numpy()[i_from] if n > 1 else np.empty(0)

    hist = pd.concat([st, inc], ignore_index=True, sort=False)
    hist = hist.sort_values("order", kind="stable").drop(columns="order").reset_index(drop=True)
    for f in INCREMENT_FLAGS:  # flags are booleans on increment rows, missing elsewhere
        hist[f] = hist[f].astype("boolean")
        hist.loc[hist["record"] == "state", f] = pd.NA
    hist["branch"] = hist["branch"].astype("int64")
    return hist


def _fit_cos(x: np.ndarray, y: np.ndarray, w: np.ndarray) -> float:
    """Weighted least squares through the origin, y = c x: c = Σ w x y / Σ w x²."""
    den = np.sum(w * x * x, axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(den > 0, np.sum(w * x * y, axis=-1) / den, np.nan)


def _angle(c):
    """θ (degrees) from cos θ, NaN outside [−1, 1] (the balance is then not a contact angle)."""
    c = np.asarray(c, dtype=float)
    with np.errstate(invalid="ignore"):
        return np.where(np.abs(c) <= 1, np.degrees(np.arccos(np.clip(c, -1, 1))), np.nan)


def _interval_weights(x, lo_deg, hi_deg) -> np.ndarray | None:
    """w = 1/(x h)², h the half-width of the increment's interval on cos θ; None if any is missing.

    The residual of increment i is e_i = x_i (cos θ_i − c), so its standard deviation is |x_i| h_i;
    inverse-variance weights then make the fit the inverse-variance mean of the increment angles'
    cosines. h is floored at 0.01 so that one increment with a degenerate interval cannot take all
    the weight (a choice of ours, not from a reference).
    """
    h = 0.5 * np.abs(np.cos(np.radians(lo_deg)) - np.cos(np.radians(hi_deg)))
    if h.size == 0 or not np.all(np.isfinite(h)):
        return None
    return 1.0 / (x * np.maximum(h, 0.01)) ** 2


def branch_summary(history: pd.DataFrame, *, n_boot: int = 1000, seed: int = 0,
                   weights: str = "auto", level: float = 0.95) -> pd.DataFrame:
    """Pooled energy-balance angle, median topological angle and hysteresis for every branch.

    For the increments of a branch, with y = Δa_nw + κ̄ φΔS_w and x = Δa_ws (1/µm), fit
    y = cos θ · x by weighted least squares through the origin (Blunt et al. 2019, eq. for the
    energy balance applied to a whole branch). Increments whose x or y is not finite, or with
    x = 0 (no change in wetted area: they carry no information on the slope, e.g. a pinned meniscus
    turning at a reversal), are left out; other flagged increments stay in (the flags are reported,
    not filtered: filter the history first to drop them).

    Parameters
    ----------
    history : pandas.DataFrame
        Output of :func:`build_history` (needs ``record``, ``branch``, ``branch_kind``,
        ``d_a_nw_per_um``, ``d_a_ws_per_um``, ``d_phi_sw``, ``kappa_mean_per_um``).
    n_boot : int, default 1000
        Bootstrap replicas: increments of a branch are resampled with replacement and refitted.
    seed : int, default 0
        Seed of the bootstrap's random generator (results are reproducible).
    weights : {"auto", "interval", "equal"}, default "auto"
        ``interval``: w = 1/(x h)², h the half-width on cos θ of the increment's interval
        (``theta_energy_lo_deg``/``_hi_deg``), floored at 0.01 — the fit becomes the
        inverse-variance mean of the increments' cos θ. ``equal``: w = 1, the ordinary fit,
        where large increments (large |Δa_ws|) count most. ``auto``: interval weights when every
        used increment of the branch has a finite interval, else equal. The choice is reported
        in column ``weighting``.
    level : float, default 0.95
        Coverage of the percentile bootstrap intervals.

    Returns
    -------
    pandas.DataFrame
        One row per branch: ``branch``, ``branch_kind``, ``n_increments``, ``n_used``,
        ``n_flagged``, ``step_first``, ``step_last``, ``saturation_w_start``, ``saturation_w_end``,
        ``cos_theta_energy_pooled``, ``theta_energy_pooled_deg`` (NaN when |cos θ| > 1),
        ``theta_energy_pooled_lo_deg``, ``theta_energy_pooled_hi_deg``, ``weighting``,
        ``theta_topo_median_deg`` (median over the branch's state rows), ``hysteresis_deg`` =
        θ(imbibition) − θ(drainage) between this branch and the nearest earlier branch of the other
        kind (``hysteresis_vs_branch``), with ``hysteresis_lo_deg``/``_hi_deg`` from independent
        bootstrap replicas of the two branches (NaN for the first branch and static branches).

    References
    ----------
    Blunt, M. J., Lin, Q., Akai, T. & Bijeljic, B. (2019). *J. Colloid Interface Sci.* 552, 59–65.
    Efron, B. & Tibshirani, R. J. (1993). *An Introduction to the Bootstrap*, ch. 13 (percentile
    interval).
    """
    if weights not in ("auto", "interval", "equal"):
        raise WetpathError(f"weights must be auto, interval or equal, got {weights!r}",
                           step="history")
    for col in ("record", "branch", "branch_kind"):
        if col not in history.columns:
            raise WetpathError(f"history table lacks column {col}", step="history")
    rng = np.random.default_rng(seed)
    alpha = (1 - level) / 2
    inc = history[history["record"] == "increment"]
    sta = history[history["record"] == "state"]
    m = len(inc)

    def col(name):
        return _column(inc, name, m).astype(float)

    x_all = col("d_a_ws_per_um")
    y_all = col("d_a_nw_per_um") + col("kappa_mean_per_um") * col("d_phi_sw")
    lo_all, hi_all = col("theta_energy_lo_deg"), col("theta_energy_hi_deg")
    flags = np.zeros(m, dtype=bool)
    for f in INCREMENT_FLAGS:
        if f in inc.columns:
            flags |= inc[f].fillna(False).to_numpy(dtype=bool)

    rows, boots = [], {}
    for b in sorted(history["branch"].unique()):
        sel = (inc["branch"] == b).to_numpy()
        kind = str(history.loc[history["branch"] == b, "branch_kind"].iloc[0])
        x, y = x_all[sel], y_all[sel]
        use = np.isfinite(x) & np.isfinite(y) & (x != 0)
        x, y = x[use], y[use]
        w = None
        if weights != "equal":
            w = _interval_weights(x, lo_all[sel][use], hi_all[sel][use])
            if w is None and weights == "interval":
                raise WetpathError(f"branch {b}: interval weights asked but some increments "
                                   "lack a finite interval", step="history")
        weighting = "equal" if w is None else "interval"
        w = np.ones_like(x) if w is None else w
        c = float(_fit_cos(x, y, w)) if x.size else math.nan
        boot = np.full(n_boot, np.nan)
        if x.size >= 2 and kind != STATIC:
            idx = rng.integers(0, x.size, size=(n_boot, x.size))
            boot = _fit_cos(x[idx], y[idx], w[idx])
        boots[b] = (kind, boot)
        c_lo, c_hi = (np.nanquantile(boot, [1 - alpha, alpha]) if np.isfinite(boot).any()
                      else (math.nan, math.nan))  # cos falls as θ rises
        s_rows = sta[sta["branch"] == b]
        i_rows = inc[sel]
        topo = _column(s_rows, "theta_topo_deg", len(s_rows)).astype(float)
        rows.append({
            "branch": int(b), "branch_kind": kind, "n_increments": int(sel.sum()),
            "n_used": int(use.sum()), "n_flagged": int(flags[sel].sum()),
            "step_first": i_rows["step_from"].iloc[0] if len(i_rows) else s_rows["step"].iloc[0],
            "step_last": i_rows["step_to"].iloc[-1] if len(i_rows) else s_rows["step"].iloc[-1],
            "saturation_w_start": (i_rows["saturation_w_from"].iloc[0] if len(i_rows)
                                   else s_rows["saturation_w"].iloc[0]),
            "saturation_w_end": (i_rows["saturation_w_to"].iloc[-1] if len(i_rows)
                                 else s_rows["saturation_w"].iloc[-1]),
            "cos_theta_energy_pooled": c,
            "theta_energy_pooled_deg": float(_angle(c)),
            "theta_energy_pooled_lo_deg": float(_angle(np.clip(c_lo, -1, 1))),
            "theta_energy_pooled_hi_deg": float(_angle(np.clip(c_hi, -1, 1))),
            "weighting": weighting,
            "theta_topo_median_deg": (float(np.nanmedian(topo)) if np.isfinite(topo).any()
                                      else math.nan),
        })

    out = pd.DataFrame(rows)
    hyst = np.full((len(out), 3), np.nan)
    ref = np.full(len(out), -1, dtype=np.int64)
    for i, r in out.iterrows():
        if r["branch_kind"] == STATIC:
            continue
        earlier = out.iloc[:i]
        other = earlier[(earlier["branch_kind"] != r["branch_kind"])
                        & (earlier["branch_kind"] != STATIC)]
        if other.empty:
            continue
        j = other.index[-1]
        imb, drn = (i, j) if r["branch_kind"] == IMBIBITION else (j, i)
        t_imb = out.at[imb, "theta_energy_pooled_deg"]
        t_drn = out.at[drn, "theta_energy_pooled_deg"]
        d_boot = (_angle(np.clip(boots[out.at[imb, "branch"]][1], -1, 1))
                  - _angle(np.clip(boots[out.at[drn, "branch"]][1], -1, 1)))
        lo, hi = (np.nanquantile(d_boot, [alpha, 1 - alpha]) if np.isfinite(d_boot).any()
                  else (math.nan, math.nan))
        hyst[i] = (t_imb - t_drn, lo, hi)
        ref[i] = out.at[j, "branch"]
    out["hysteresis_deg"], out["hysteresis_lo_deg"], out["hysteresis_hi_deg"] = hyst.T
    out["hysteresis_vs_branch"] = pd.array(np.where(ref > 0, ref, 0), dtype="Int64")
    out.loc[ref <= 0, "hysteresis_vs_branch"] = pd.NA
    return out


def _fmt(v, spec: str) -> str:
    if v is None or (isinstance(v, float) and not math.isfinite(v)) or pd.isna(v):
        return "–"
    return format(v, spec)


def _fmt_interval(lo, hi, spec: str) -> str:
    if pd.isna(lo) or pd.isna(hi):
        return "–"
    return f"{_fmt(lo, spec)}–{_fmt(hi, spec)}"


def format_branch_summary(source: str | os.PathLike | pd.DataFrame) -> str:
    """The branch summary as a plain-text table for a terminal.

    Parameters
    ----------
    source : path or pandas.DataFrame
        A branch-summary table, a ``branches.csv`` file, or a results directory holding
        ``branches.csv`` (or, failing that, ``history.csv``, from which the summary is computed).

    Returns
    -------
    str
        One line per branch: number, kind, steps, S_w start → end, increments used, pooled energy
        angle with its interval, median topological angle and hysteresis, in degrees.

    Raises
    ------
    WetpathError
        If the path holds neither table.
    """
    table = source
    if not isinstance(source, pd.DataFrame):
        path = Path(source)
        if path.is_dir():
            if (path / HISTORY_FILES["branches_csv"]).is_file():
                table = pd.read_csv(path / HISTORY_FILES["branches_csv"])
            elif (path / HISTORY_FILES["history_csv"]).is_file():
                table = branch_summary(pd.read_csv(path / HISTORY_FILES["history_csv"]))
            else:
                raise WetpathError("no branches.csv or history.csv here", step="summary",
                                   path=path)
        elif path.is_file():
            table = pd.read_csv(path)
        else:
            raise WetpathError("no such file or directory", step="summary", path=path)
    header = ["branch", "kind", "steps", "S_w start→end", "used", "θ energy [°]", "95% interval",
              "θ topo median [°]", "hysteresis [°]", "95% interval"]
    lines = []
    for _, r in table.iterrows():
        lines.append([
            str(int(r["branch"])), str(r["branch_kind"]),
            f"{r['step_first']}→{r['step_last']}",
            f"{_fmt(r['saturation_w_start'], '.3f')}→{_fmt(r['saturation_w_end'], '.3f')}",
            f"{int(r['n_used'])}/{int(r['n_increments'])}",
            _fmt(r["theta_energy_pooled_deg"], ".1f"),
            _fmt_interval(r["theta_energy_pooled_lo_deg"], r["theta_energy_pooled_hi_deg"], ".1f"),
            _fmt(r["theta_topo_median_deg"], ".1f"),
            _fmt(r["hysteresis_deg"], "+.1f"),
            _fmt_interval(r["hysteresis_lo_deg"], r["hysteresis_hi_deg"], "+.1f"),
        ])
    widths = [max(len(h), *(len(row[k]) for row in lines)) if lines else len(h)
              for k, h in enumerate(header)]
    fmt_row = "  ".join(f"{{:<{w}}}" if k < 2 else f"{{:>{w}}}"
                        for k, w in enumerate(widths)).format
    rule = "  ".join("-" * w for w in widths)
    return "\n".join([fmt_row(*header), rule, *(fmt_row(*row) for row in lines)])


def write_history_tables(out_dir: str | os.PathLike, history: pd.DataFrame,
                         branches: pd.DataFrame) -> list[Path]:
    """Write ``history.csv``, ``history.parquet`` and ``branches.csv`` atomically into ``out_dir``.

    Returns the written paths.
    """
    import io

    from ._atomic import atomic_write_table

    out = Path(out_dir)
    buf = io.BytesIO()
    history.to_parquet(buf, index=False)
    return [
        atomic_write_table(history, out / HISTORY_FILES["history_csv"]),
        atomic_write_bytes(out / HISTORY_FILES["history_parquet"], buf.getvalue()),
        atomic_write_table(branches, out / HISTORY_FILES["branches_csv"]),
    ]
