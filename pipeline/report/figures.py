"""The report's figures: one pure function per figure, each returning its :class:`matplotlib.figure.Figure`.

Every function takes plain products (a PolarSeries :class:`xarray.Dataset`,
the latitude-time :class:`xarray.DataArray`, the reversal / cycle / forecast
JSON objects as dicts, a calibration table, history entries) and draws on
matplotlib's non-interactive Agg canvas (no display, no global pyplot state);
nothing is written until :func:`save_figure` writes the PNG (atomically).
Returning the Figure lets a caller (and the tests) read what was drawn: axes
labels, lines, meshes and markers.  Times are drawn as decimal years (UTC).
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import TwoSlopeNorm
from matplotlib.figure import Figure
from matplotlib.ticker import MaxNLocator

from pipeline.timeutil import decimal_year

__all__ = [
    "POLE_COLOURS",
    "polar_series_figure",
    "latitude_time_figure",
    "calibration_figure",
    "forecast_history_figure",
    "forecast_trajectory_figure",
    "skill_phase_figure",
    "TARGET_COLOURS",
    "diagnostics_figure",
    "figure_size_in",
    "save_figure",
]

#: line colours of the three series (colour-blind-safe pairs, our own choice)
POLE_COLOURS = {"north": "#1b5e9e", "south": "#c2402a", "dipole": "#2f7d3b"}
_REVERSAL_ALPHA = 0.16
_GRID = {"color": "0.88", "linewidth": 0.6}


def figure_size_in(settings, aspect: float) -> tuple[float, float]:
    """``(width, height)`` in inches for a figure ``aspect`` = height / width."""
    width = float(settings.figure_width_in)
    return width, width * aspect


def _new_figure(settings, aspect: float, nrows: int = 1, ncols: int = 1, **kw):
    fig = Figure(figsize=figure_size_in(settings, aspect), layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(nrows, ncols, squeeze=False, **kw)
    for ax in axes.ravel():
        ax.grid(True, **_GRID)
        ax.set_axisbelow(True)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
    return fig, axes


def save_figure(fig, out_path, settings) -> Path:
    """Write ``fig`` as a PNG at ``settings.dpi`` (atomically: a temporary file renamed into place).

    Parameters
    ----------
    fig : matplotlib.figure.Figure
        As returned by one of the figure functions.
    out_path : path-like
        The PNG; its folder is created if needed.
    settings : pipeline.report.ReportSettings

    Returns
    -------
    matplotlib.figure.Figure
    """
    from pipeline.jsonio import atomic_output

    out_path = Path(out_path)
    out_path.parent.mkdir(parents=True, exist_ok=True)
    with atomic_output(out_path) as tmp:
        fig.savefig(tmp, dpi=int(settings.dpi), format="png", metadata={"Software": None})
    return out_path


def _years(t) -> np.ndarray:
    t = np.asarray(t)
    if t.size == 0:
        return np.zeros(0)
    if t.dtype.kind in ("f", "i", "u"):
        return t.astype(np.float64)
    return np.atleast_1d(decimal_year(t)).astype(np.float64)


def _no_data(ax, text: str) -> None:
    ax.text(0.5, 0.5, text, transform=ax.transAxes, ha="center", va="center", color="0.4")


def _mark_reversals(ax, result: dict | None, colour: str, label: str | None, name: str) -> None:
    """Shaded interval and a vertical line per crossing; the final one drawn heavier.

    Every artist carries a ``gid``: ``reversal:NAME`` (or ``reversal:NAME:final``) on
    the line at the epoch, ``reversal-interval:NAME`` on the shaded span.
    """
    if not result:
        return
    final = result.get("final") or {}
    for c in result.get("crossings") or []:
        lo, hi, t = c.get("low"), c.get("high"), c.get("time")
        if t is None:
            continue
        if lo is not None and hi is not None and hi > lo:
            ax.axvspan(lo, hi, color=colour, alpha=_REVERSAL_ALPHA, linewidth=0, gid=f"reversal-interval:{name}")
        is_final = bool(final) and abs(float(final.get("time", math.nan)) - float(t)) < 1e-9
        ax.axvline(t, color=colour, linewidth=1.8 if is_final else 0.9, linestyle="-" if is_final else ":",
                   label=label if is_final else None, gid=f"reversal:{name}" + (":final" if is_final else ""))


def _mark_cycles(ax, cycles: dict | None) -> None:
    """Vertical lines at the cycle minima (dashed) and maxima (dash-dot) of a ``polecast cycles`` object.

    Only those inside the axes' time range; ``gid`` ``cycle:minimum`` or ``cycle:maximum``.
    """
    if not cycles:
        return
    lo, hi = ax.get_xlim()
    seen = set()
    for c in cycles.get("cycles") or []:
        for key, style, name in (("minimum_time", "--", "cycle minimum"), ("maximum_time", "-.", "cycle maximum")):
            t = c.get(key)
            if t is None or not lo <= t <= hi:
                continue
            ax.axvline(t, color="0.35", linestyle=style, linewidth=0.9,
                       label=name if name not in seen else None, gid=f"cycle:{key.split('_')[0]}")
            seen.add(name)


def _precursor_window(precursor: dict | None) -> tuple[float, float, str] | None:
    """``(start, end, label)`` of the precursor window of a forecast (or forecast-state) object, or None."""
    detail = (precursor or {}).get("precursor_detail") or {}
    centre, half = detail.get("time"), detail.get("window_years")
    if not isinstance(centre, (int, float)) or not isinstance(half, (int, float)) or not half > 0:
        return None
    phase = (precursor or {}).get("phase") or detail.get("phase") or "?"
    return float(centre) - float(half), float(centre) + float(half), f"precursor window ({phase})"


def _mark_precursor_window(ax, window) -> None:
    """The precursor window as a hatched span, ``gid`` ``precursor-window``."""
    if window is None:
        return
    lo, hi, label = window
    ax.axvspan(lo, hi, facecolor="#f2c14e", alpha=0.28, edgecolor="#a87b00", hatch="//", linewidth=0.8,
               label=label, gid="precursor-window", zorder=0)


def polar_series_figure(series, settings, *, reversals: dict | None = None,
                        cycles: dict | None = None, precursor: dict | None = None) -> Figure:
    """North, south and axial-dipole polar fields per rotation, smoothed, with reversals and cycle extrema.

    Parameters
    ----------
    series : xarray.Dataset
        A PolarSeries (``rotation_time``, ``*_br_rotation_gauss``,
        ``*_br_rotation_error_gauss``, ``*_br_smooth_gauss``; gauss).
    settings : pipeline.report.ReportSettings
    reversals : dict, optional
        The ``polecast reversals`` object (``north``/``south``/``dipole`` with
        ``crossings`` and ``final``; times in decimal years).
    cycles : dict, optional
        The ``polecast cycles`` object (``cycles``: minima and maxima, decimal years).
    precursor : dict, optional
        The forecast object, or the forecast state when no forecast could be
        made (``phase`` and ``precursor_detail`` with the window's centre
        ``time`` and half-width ``window_years``, decimal years): the window
        is drawn as a hatched span on both panels (``gid``
        ``precursor-window``).

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    The dipole panel shows the axial dipole proxy ``(N - S) / 2`` (DESIGN.md).
    Error bars are the one-sigma standard errors of the rotation means.
    """
    fig, axes = _new_figure(settings, 0.62, 2, 1, sharex=True)
    top, bottom = axes[0, 0], axes[1, 0]
    n_rot = int(series.sizes.get("rotation", 0)) if series is not None else 0
    if n_rot == 0:
        _no_data(top, "no measured rotation")
        _no_data(bottom, "no measured rotation")
    else:
        t = _years(series["rotation_time"].values)
        for ax, poles in ((top, ("north", "south")), (bottom, ("dipole",))):
            for pole in poles:
                colour = POLE_COLOURS[pole]
                y = series[f"{pole}_br_rotation_gauss"].values
                err = series[f"{pole}_br_rotation_error_gauss"].values
                ok = np.isfinite(y)
                ax.errorbar(t[ok], y[ok], yerr=np.where(np.isfinite(err[ok]), err[ok], 0.0), fmt="o",
                            markersize=2.4, color=colour, ecolor=colour, elinewidth=0.6, alpha=0.55,
                            label=f"{pole} (per rotation)")
                sm = series[f"{pole}_br_smooth_gauss"].values
                ax.plot(t, sm, color=colour, linewidth=1.8, label=f"{pole} (smoothed)")
            ax.axhline(0.0, color="0.2", linewidth=0.7)
        reversals = reversals or {}
        for ax, pole in ((top, "north"), (top, "south"), (bottom, "dipole")):
            _mark_reversals(ax, reversals.get(pole), POLE_COLOURS[pole], f"{pole} reversal (final)", pole)
        pad = max(0.05 * (t.max() - t.min()), 0.1)
        top.set_xlim(t.min() - pad, t.max() + pad)
        _mark_cycles(top, cycles)
        _mark_cycles(bottom, cycles)
        window = _precursor_window(precursor)
        for ax in (top, bottom):
            _mark_precursor_window(ax, window)
        for ax in (top, bottom):
            ax.legend(fontsize="x-small", loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    top.set_ylabel("polar-cap mean Br (G)")
    bottom.set_ylabel("(N - S)/2 (G)")
    bottom.set_xlabel("time (decimal year, UTC)")
    smoothing = "" if series is None else str(series.attrs.get("smoothing_description", ""))
    b0 = "" if series is None else str(series.attrs.get("b0_method", ""))
    level = ((reversals or {}).get("north") or {}).get("level", 0.9)
    top.set_title(f"Polar fields per Carrington rotation (B0 method: {b0 or 'n/a'}; smoothing: "
                  f"{smoothing or 'n/a'})\nshaded: {100 * float(level):g}% reversal intervals (noise and analysis "
                  f"choices); hatched: precursor window", fontsize="small")
    return fig


def latitude_time_figure(diagram, settings, *, cap_latitude_deg: float = 60.0) -> Figure:
    """Latitude-time diagram of the longitude-averaged Br (gauss) with the cap boundary marked.

    Parameters
    ----------
    diagram : xarray.DataArray
        Dims ``("latitude", "rotation")``, coordinates ``latitude_lower``,
        ``latitude_upper`` (deg) and ``rotation_time``; gauss.
    settings : pipeline.report.ReportSettings
    cap_latitude_deg : float
        Polar-cap boundary drawn at +- this latitude (degrees).

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    The colour scale is symmetric about zero at the 98th percentile of |Br|
    (robust to a few extreme bins; common practice, no source); empty bins
    are left blank.
    """
    fig, axes = _new_figure(settings, 0.5)
    ax = axes[0, 0]
    ax.grid(False)
    values = None if diagram is None else np.asarray(diagram.values, dtype=np.float64)
    if values is None or values.size == 0 or not np.isfinite(values).any() or diagram.sizes.get("rotation", 0) < 1:
        _no_data(ax, "no latitude profile in the measured frames")
    else:
        t = _years(diagram["rotation_time"].values)
        if t.size > 1:
            step = np.diff(t)
            t_edges = np.concatenate([[t[0] - step[0] / 2], t[:-1] + step / 2, [t[-1] + step[-1] / 2]])
        else:
            t_edges = np.array([t[0] - 0.037, t[0] + 0.037])  # one rotation ~ 27.3 d (common practice)
        if "latitude_lower" in diagram.coords:
            lat_edges = np.concatenate([diagram["latitude_lower"].values, diagram["latitude_upper"].values[-1:]])
        else:
            lat = np.asarray(diagram["latitude"].values, dtype=np.float64)
            half = 0.5 * (lat[1] - lat[0]) if lat.size > 1 else 0.5
            lat_edges = np.concatenate([lat - half, lat[-1:] + half])
        vmax = float(np.nanpercentile(np.abs(values), 98)) or 1.0
        mesh = ax.pcolormesh(t_edges, lat_edges, np.ma.masked_invalid(values), cmap="RdBu_r",
                             norm=TwoSlopeNorm(vcenter=0.0, vmin=-vmax, vmax=vmax), shading="flat")
        bar = fig.colorbar(mesh, ax=ax, pad=0.01)
        bar.set_label("longitude-averaged Br (G)")
        for sign in (1, -1):
            ax.axhline(sign * cap_latitude_deg, color="k", linestyle="--", linewidth=1.0, gid="cap-boundary")
        ax.set_ylim(lat_edges.min(), lat_edges.max())
    ax.set_xlabel("time (decimal year, UTC)")
    ax.set_ylabel("heliographic latitude (deg)")
    ax.set_title("Longitude-averaged radial field per Carrington rotation; dashed: polar-cap boundary "
                 f"|latitude| = {cap_latitude_deg:g} deg", fontsize="small")
    return fig


def _band(fit, x_grid, level, predict):
    lo, hi = np.empty_like(x_grid), np.empty_like(x_grid)
    mid = np.empty_like(x_grid)
    for i, x in enumerate(x_grid):
        mid[i], lo[i], hi[i] = predict(fit, float(x), level)
    return mid, lo, hi


def calibration_figure(table, settings, *, forecast: dict | None = None,
                       method: str = "ols") -> Figure:
    """Precursor against next-cycle amplitude, the fitted line, its prediction bands and the forecast.

    Parameters
    ----------
    table : pipeline.regression.CalibrationTable
        Past cycles: precursor (gauss) and amplitude (sunspot number).
    settings : pipeline.report.ReportSettings
    forecast : dict, optional
        The ``polecast forecast`` object (``precursor``, ``precursor_error``,
        ``amplitude``, ``interval_68``, ``interval_95``, ``method``).
    method : str
        Regression method when ``forecast`` does not name one.

    Returns
    -------
    matplotlib.figure.Figure

    Notes
    -----
    The bands are the 68.27% and 95% prediction intervals of a new cycle at
    each precursor, :func:`pipeline.regression.predict` (Draper & Smith 1998,
    Applied Regression Analysis, sec. 1.4), from the same fit the forecast
    used.
    """
    from pipeline.regression import LEVEL_68, LEVEL_95, METHODS, predict

    fig, axes = _new_figure(settings, 0.62)
    ax = axes[0, 0]
    x = np.asarray(table.precursor, dtype=np.float64)
    y = np.asarray(table.amplitude, dtype=np.float64)
    method = (forecast or {}).get("method") or method
    fitter = METHODS.get(method)
    xs = list(x)
    if forecast and forecast.get("precursor") is not None:
        xs.append(float(forecast["precursor"]))
    if x.size >= 3 and fitter is not None:
        span = max(xs) - min(xs) or 1.0
        grid = np.linspace(min(xs) - 0.08 * span, max(xs) + 0.08 * span, 120)
        if method == "loglinear":
            grid = grid[grid > 0]
        fit = fitter(x, y, table.precursor_error, table.amplitude_error)
        mid, lo95, hi95 = _band(fit, grid, LEVEL_95, predict)   # Draper & Smith (1998) sec. 1.4
        _, lo68, hi68 = _band(fit, grid, LEVEL_68, predict)
        ax.fill_between(grid, lo95, hi95, color="#9db7d5", alpha=0.35, linewidth=0, label="95% prediction band")
        ax.fill_between(grid, lo68, hi68, color="#4f7fb5", alpha=0.35, linewidth=0, label="68% prediction band")
        ax.plot(grid, mid, color="#173f6b", linewidth=1.6, label=f"fitted line ({method})")
    xerr = None if table.precursor_error is None else np.asarray(table.precursor_error)
    yerr = None if table.amplitude_error is None else np.asarray(table.amplitude_error)
    ax.errorbar(x, y, xerr=xerr, yerr=yerr, fmt="o", color="0.15", markersize=4.5, elinewidth=0.7,
                label="calibration cycles", zorder=4)
    for name, xi, yi in zip(table.cycle, x, y):
        ax.annotate(_short(str(name), 16), (xi, yi), textcoords="offset points", xytext=(4, 4), fontsize="xx-small",
                    color="0.3")
    if forecast and forecast.get("amplitude") is not None:
        xp, yp = float(forecast["precursor"]), float(forecast["amplitude"])
        lo95, hi95 = forecast.get("interval_95") or (yp, yp)
        lo68, hi68 = forecast.get("interval_68") or (yp, yp)
        xe = forecast.get("precursor_error")
        ax.errorbar([xp], [yp], yerr=[[yp - lo95], [hi95 - yp]], xerr=None if xe is None else [xe], fmt="none",
                    ecolor="#d9822b", elinewidth=1.0, capsize=4, zorder=5)
        ax.errorbar([xp], [yp], yerr=[[yp - lo68], [hi68 - yp]], fmt="D", color="#d9822b", markersize=7,
                    elinewidth=3.0, capsize=0, zorder=6,
                    label=f"forecast {yp:.0f} (68%: {lo68:.0f}-{hi68:.0f}; 95%: {lo95:.0f}-{hi95:.0f})")
    ax.set_xlabel("polar-field precursor (G)")
    ax.set_ylabel("next-cycle amplitude (13-month smoothed sunspot number)")
    ax.set_title("Calibration of the polar-field precursor", fontsize="small")
    ax.legend(fontsize="x-small", loc="upper left", framealpha=0.85)
    return fig


#: colours of successive target cycles in the history and trajectory figures (our own choice)
TARGET_COLOURS = ("#b35806", "#542788", "#1b7837", "#2166ac", "#b2182b", "#4d4d4d")


def _target_label(target) -> str:
    return "target unknown" if target is None else f"target cycle {target}"


def _entry_date_years(e: dict, key: str = "data_date") -> float:
    """Decimal year of an entry's ISO date (``data_date``); ValueError/KeyError/TypeError when unusable."""
    return float(_years(np.array([str(e[key])[:10]], dtype="datetime64[D]"))[0])


def _rows_by_target(entries: list, date_key: str = "data_date") -> dict:
    """Target cycle -> sorted ``(t, a, lo68, hi68, lo95, hi95)`` rows of the entries with a usable date and amplitude."""
    groups: dict = {}
    for e in entries:
        try:
            t = _entry_date_years(e, date_key)
            a = float(e["amplitude"])
        except (KeyError, TypeError, ValueError):
            continue
        if not math.isfinite(a):
            continue
        i68 = e.get("interval_68") or [a, a]
        i95 = e.get("interval_95") or [a, a]
        target = e.get("target_cycle")
        target = target if isinstance(target, int) and not isinstance(target, bool) else None
        groups.setdefault(target, []).append(
            (t, a, *[math.nan if v is None else float(v) for v in (*i68, *i95)]))
    return {k: sorted(v) for k, v in sorted(groups.items(), key=lambda kv: (kv[0] is None, kv[0] or 0))}


def _draw_target(ax, rows: list, colour: str, label: str, gid: str, errorbars: bool = True) -> None:
    """One target cycle: 95% and 68% bands (``gid`` ``GID:band95``/``GID:band68``), 95% error bars and the
    amplitude line (``gid`` ``GID``)."""
    arr = np.array(rows)
    t, a, lo68, hi68, lo95, hi95 = arr.T
    if t.size > 1:
        ax.fill_between(t, lo95, hi95, color=colour, alpha=0.13, linewidth=0, label=f"{label}: 95% interval",
                        gid=f"{gid}:band95")
        ax.fill_between(t, lo68, hi68, color=colour, alpha=0.26, linewidth=0, label=f"{label}: 68% interval",
                        gid=f"{gid}:band68")
    if errorbars or t.size == 1:
        ax.errorbar(t, a, yerr=[a - lo95, hi95 - a], fmt="none", ecolor=colour, elinewidth=0.7, capsize=2.5,
                    alpha=0.8)
    ax.plot(t, a, "o-", color=colour, markersize=3.5, linewidth=1.3, label=f"{label}: forecast amplitude", gid=gid)


def forecast_history_figure(entries: list, settings) -> Figure:
    """How the forecast moved with each update: amplitude and its 68% / 95% intervals against data date.

    One line per target cycle: entries forecasting different cycles are never
    joined (an update after the minimum predicts the cycle that minimum begins,
    not the one before it).

    Parameters
    ----------
    entries : list of dict
        :func:`pipeline.history.read_history` entries (``data_date`` ISO date,
        ``amplitude``, ``interval_68``, ``interval_95``, ``target_cycle``;
        entries written before ``target_cycle`` existed form one "target
        unknown" line); entries without a usable date or amplitude are left out.
    settings : pipeline.report.ReportSettings

    Returns
    -------
    matplotlib.figure.Figure
        The amplitude line of each target carries ``gid``
        ``history:target:N`` (``history:target:unknown``), its bands
        ``...:band68`` / ``...:band95``.
    """
    groups = _rows_by_target(entries)
    n = sum(len(v) for v in groups.values())
    fig, axes = _new_figure(settings, 0.45)
    ax = axes[0, 0]
    if not groups:
        _no_data(ax, "no forecast history yet")
    else:
        times = []
        for k, (target, rows) in enumerate(groups.items()):
            gid = f"history:target:{'unknown' if target is None else target}"
            _draw_target(ax, rows, TARGET_COLOURS[k % len(TARGET_COLOURS)], _target_label(target), gid)
            times += [r[0] for r in rows]
        if len(set(times)) == 1:
            ax.set_xlim(times[0] - 0.5, times[0] + 0.5)
        ax.ticklabel_format(axis="x", useOffset=False, style="plain")
        ax.legend(fontsize="x-small", loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    ax.set_xlabel("date of the newest data used (decimal year)")
    ax.set_ylabel("forecast amplitude (sunspot number)")
    ax.set_title(f"Forecast history ({n} update{'s' if n != 1 else ''}; one line per target cycle)", fontsize="small")
    return fig


_PHASE_SHORT = {"minimum": "min"}


def _short_phase(phase) -> str:
    text = str(phase)
    return _PHASE_SHORT.get(text, text.replace("reversal+", "r+"))


def forecast_trajectory_figure(trajectory: dict, settings) -> Figure:
    """The forecast as it would have been made as of each date: amplitude with its 68% / 95% bands.

    One line per target cycle against the date of the newest data used; the
    truth of each target is a dashed line in its colour over the target's dates (the smoothed maximum
    when the sunspot series has it, the synthetic star's next amplitude for a
    synthetic archive); dates without a forecast are ticks along the bottom.

    Parameters
    ----------
    trajectory : dict
        ``trajectory.json`` (:func:`pipeline.run.forecast_trajectory` rows:
        ``data_date``, ``target_cycle``, ``phase``, ``amplitude``,
        ``interval_68``, ``interval_95``, ``truth_amplitude``,
        ``truth_source``, ``forecast_unavailable``).
    settings : pipeline.report.ReportSettings

    Returns
    -------
    matplotlib.figure.Figure
        ``gid`` ``trajectory:target:N`` on each amplitude line (bands
        ``...:band68`` / ``...:band95``), ``trajectory:truth:N`` on each
        truth line, ``trajectory:unavailable`` on the ticks of dates without
        a forecast.
    """
    rows = [r for r in (trajectory or {}).get("rows") or [] if isinstance(r, dict)]
    made = [r for r in rows if r.get("amplitude") is not None]
    groups = _rows_by_target(made)
    fig, axes = _new_figure(settings, 0.5)
    ax = axes[0, 0]
    if not groups:
        _no_data(ax, "no as-of date gave a forecast")
    else:
        for k, (target, group) in enumerate(groups.items()):
            colour = TARGET_COLOURS[k % len(TARGET_COLOURS)]
            gid = f"trajectory:target:{'unknown' if target is None else target}"
            _draw_target(ax, group, colour, _target_label(target), gid, errorbars=False)
            mine = sorted((r for r in made if r.get("target_cycle") == target), key=lambda r: str(r["data_date"]))
            last = None
            for r in mine:   # the phase where it changes, so a reader sees which calibration each stretch used
                if r.get("phase") != last:
                    ax.annotate(_short_phase(r.get("phase")), (_entry_date_years(r), float(r["amplitude"])),
                                textcoords="offset points", xytext=(0, 7), ha="center", fontsize="xx-small",
                                color=colour)
                    last = r.get("phase")
            truths = {(r.get("truth_amplitude"), r.get("truth_source")) for r in mine
                      if r.get("truth_amplitude") is not None}
            t0, t1 = group[0][0], group[-1][0]
            pad = max(0.03 * (t1 - t0), 0.15)
            for amp, source in sorted(truths, key=lambda x: (x[0], str(x[1]))):
                name = "truth (synthetic star)" if source == "truth.json" else "observed maximum"
                ax.plot([t0 - pad, t1 + pad], [float(amp)] * 2, color=colour, linestyle="--", linewidth=1.4,
                        label=f"{_target_label(target)}: {name} {float(amp):.1f}",
                        gid=f"trajectory:truth:{'unknown' if target is None else target}")
    missing = []
    for r in rows:
        if r.get("amplitude") is None:
            try:
                missing.append(_entry_date_years(r) if r.get("data_date") else
                               float(_years(np.array([str(r["as_of"])[:10]], dtype="datetime64[D]"))[0]))
            except (KeyError, TypeError, ValueError):
                continue
    if missing:
        ax.plot(missing, np.zeros(len(missing)), "|", color="0.45", markersize=9, transform=ax.get_xaxis_transform(),
                clip_on=False, label=f"no forecast ({len(missing)} date{'s' if len(missing) != 1 else ''})",
                gid="trajectory:unavailable")
    ax.ticklabel_format(axis="x", useOffset=False, style="plain")
    if groups or missing:
        ax.legend(fontsize="x-small", loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    ax.set_xlabel("date of the newest data used (decimal year)")
    ax.set_ylabel("forecast amplitude (sunspot number)")
    step = (trajectory or {}).get("step_months")
    ax.set_title(f"Forecast trajectory: as of {len(rows)} dates"
                 + (f" every {step} months" if step else "") + f", {len(made)} with a forecast; labels: phase",
                 fontsize="small")
    return fig


def _phase_order(phase: str) -> float:
    """Where a phase falls in a cycle: reversal+L at L years, the minimum after every lag."""
    from pipeline.precursor import phase_lag_years

    lag = phase_lag_years(phase)
    return math.inf if lag is None else lag


def skill_phase_figure(hindcasts: list, settings) -> Figure:
    """Hindcast skill against the phase the precursor was taken at: error and interval coverage.

    Parameters
    ----------
    hindcasts : list of dict
        ``polecast hindcast --format json`` objects, one per phase
        (:func:`pipeline.report.load_hindcasts`): ``phase`` and ``skill``
        (``n``, ``rmse``, ``bias``, ``coverage_68``, ``coverage_95``; see
        :mod:`pipeline.hindcast`).
    settings : pipeline.report.ReportSettings

    Returns
    -------
    matplotlib.figure.Figure
        Phases on the x axis in cycle order (``reversal+L`` by L, then
        ``minimum``); top panel RMSE and bias (sunspot number, ``gid``
        ``skill:rmse`` / ``skill:bias``), bottom panel the 68% and 95%
        coverage (``skill:coverage_68`` / ``skill:coverage_95``) with the
        nominal levels dashed (``skill:nominal_68`` / ``skill:nominal_95``).
        A phase whose skill value is null is left out of that line.

    Notes
    -----
    Coverage is the fraction of hindcast truths inside the stated interval;
    with n hindcasts its binomial standard error at level p is
    :math:`\\sqrt{p(1-p)/n}` (common practice, no source), drawn as error bars.
    """
    items = sorted(hindcasts, key=lambda h: _phase_order(h["phase"]))
    phases = [h["phase"] for h in items]
    x = np.arange(len(items), dtype=np.float64)
    fig, axes = _new_figure(settings, 0.62, 2, 1, sharex=True)
    top, bottom = axes[0, 0], axes[1, 0]

    def values(key):
        v = np.array([math.nan if (h.get("skill") or {}).get(key) is None else float(h["skill"][key])
                      for h in items])
        return v

    n = np.array([int((h.get("skill") or {}).get("n") or 0) for h in items])
    for key, colour, marker in (("rmse", "#2166ac", "o"), ("bias", "#b2182b", "s")):
        v = values(key)
        ok = np.isfinite(v)
        top.plot(x[ok], v[ok], marker=marker, color=colour, linewidth=1.2, label=key.upper() if key == "rmse"
                 else "bias (forecast \u2212 truth)", gid=f"skill:{key}")
    top.axhline(0.0, color="0.3", linewidth=0.7)
    for level, colour, marker in ((68, "#d9822b", "o"), (95, "#542788", "s")):
        v = values(f"coverage_{level}")
        ok = np.isfinite(v) & (n > 0)
        p = level / 100.0
        se = np.sqrt(p * (1.0 - p) / np.where(n > 0, n, 1))   # binomial standard error (common practice)
        bars = bottom.errorbar(x[ok], v[ok], yerr=se[ok], fmt=marker + "-", color=colour, ecolor=colour,
                               elinewidth=0.7, capsize=3, linewidth=1.2,
                               label=f"{level}% interval coverage (\u00b11 binomial s.e.)")
        bars.lines[0].set_gid(f"skill:coverage_{level}")
        bottom.axhline(p, color=colour, linestyle="--", linewidth=0.9, label=f"nominal {level}%",
                       gid=f"skill:nominal_{level}")
    bottom.set_ylim(-0.05, 1.05)
    bottom.set_xticks(x, [f"{ph}\n(n={k})" for ph, k in zip(phases, n)], fontsize="x-small")
    top.set_ylabel("error (sunspot number)")
    bottom.set_ylabel("coverage (fraction)")
    bottom.set_xlabel("phase of the precursor")
    for ax in (top, bottom):
        ax.legend(fontsize="x-small", loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    top.set_title(f"Hindcast skill against phase ({len(items)} phase{'s' if len(items) != 1 else ''})\neach target "
                  f"forecast as of the date its window was complete, calibrated without it", fontsize="small")
    return fig


def diagnostics_figure(series, skip_reasons: dict, settings) -> Figure:
    """B0 angle and polar-cap coverage per frame over time, and skipped files by reason.

    Parameters
    ----------
    series : xarray.Dataset or None
        A PolarSeries (per frame: ``time``, ``b0_deg`` in degrees,
        ``north_coverage``, ``south_coverage`` as fractions).
    skip_reasons : dict
        Reason group -> number of skipped files (e.g. ``Store.summary()["skip_reasons"]``).
    settings : pipeline.report.ReportSettings

    Returns
    -------
    matplotlib.figure.Figure
    """
    fig, axes = _new_figure(settings, 0.85, 3, 1)
    ax_b0, ax_cov, ax_skip = axes[:, 0]
    n = 0 if series is None else int(series.sizes.get("time", 0))
    if n == 0:
        _no_data(ax_b0, "no measured frame")
        _no_data(ax_cov, "no measured frame")
    else:
        t = _years(series["time"].values)
        ax_b0.plot(t, series["b0_deg"].values, ".", color="0.25", markersize=2.5)
        ax_b0.axhline(0.0, color="0.5", linewidth=0.6)
        for pole in ("north", "south"):
            ax_cov.plot(t, series[f"{pole}_coverage"].values, ".", color=POLE_COLOURS[pole], markersize=2.5,
                        label=f"{pole} cap")
        ax_cov.set_ylim(0.0, 1.05)
        ax_cov.legend(fontsize="x-small", loc="lower right", framealpha=0.85)
        ax_cov.set_xlim(ax_b0.get_xlim())
    ax_b0.set_ylabel("B0 (deg)")
    ax_b0.set_title(f"Observing geometry and coverage of {n} measured frame{'s' if n != 1 else ''}",
                    fontsize="small")
    ax_cov.set_ylabel("cap coverage (fraction)")
    ax_cov.set_xlabel("time (decimal year, UTC)")
    items = sorted((skip_reasons or {}).items(), key=lambda kv: (-kv[1], kv[0]))
    if not items:
        _no_data(ax_skip, "no skipped file")
        ax_skip.set_yticks([])
    else:
        labels = [_short(str(k)) for k, _ in items]
        counts = [int(v) for _, v in items]
        pos = np.arange(len(items))
        ax_skip.barh(pos, counts, color="#8c6bb1")
        ax_skip.xaxis.set_major_locator(MaxNLocator(integer=True))
        ax_skip.set_yticks(pos, labels, fontsize="x-small")
        ax_skip.invert_yaxis()
        for p, c in zip(pos, counts):
            ax_skip.text(c, p, f" {c}", va="center", fontsize="x-small")
    ax_skip.set_xlabel("skipped files")
    ax_skip.set_title("Skipped files by reason", fontsize="small")
    return fig


def _short(text: str, limit: int = 48) -> str:
    # matplotlib treats '$' as mathtext; show reasons literally
    text = text.replace("$", r"\$")
    return text if len(text) <= limit else text[: limit - 1] + "\u2026"
