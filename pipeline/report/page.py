"""The report page's sections from the products: tables of reversals, forecast, truth, store and config.

Pure functions from plain products to HTML fragments; every value passes
through :func:`pipeline.report.html.esc` (inside :func:`table_html`,
:func:`note_html` and :func:`json_block`).
"""

from __future__ import annotations

import math

from pipeline.report.html import figure_html, format_number, json_block, note_html, page_html, table_html
from pipeline.regression import CAUTION_SENTENCES

__all__ = ["CAUTION_TEXTS", "reversal_tables", "forecast_table", "precursor_statement", "truth_table", "cycles_table",
           "skipped_table", "store_table", "versions_table", "calibration_rows_table", "assemble_page"]

#: the cautions shown at the top of every report (the forecast's own, pipeline.regression)
CAUTION_TEXTS = CAUTION_SENTENCES

_POLES = ("north", "south", "dipole")


def _f(v, spec=".3f"):
    return format_number(v, spec)


def _level_text(level) -> str:
    """``"90%"`` from a level 0.9 (the reversal intervals' default when the product states none)."""
    try:
        return f"{100 * float(level):g}%"
    except (TypeError, ValueError):
        return "90%"


def _interval_text(iv) -> str:
    if not isinstance(iv, dict) or iv.get("low") is None or iv.get("high") is None:
        return ""
    return f"{_f(iv['low'])} \u2013 {_f(iv['high'])}"


def reversal_tables(reversals: dict | None) -> str:
    """One table per series (north, south, dipole): every crossing with its interval, the final one marked."""
    if not reversals:
        return note_html("no reversal product")
    parts = []
    for pole in _POLES:
        res = reversals.get(pole)
        if not isinstance(res, dict):
            parts.append(f"<h3>{pole}</h3>" + note_html("not available"))
            continue
        final = res.get("final") or {}
        pct = _level_text(res.get("level"))
        rows, classes = [], []
        for i, c in enumerate(res.get("crossings") or [], start=1):
            is_final = bool(final) and c.get("time") == final.get("time")
            lo, hi = c.get("low"), c.get("high")
            width = None if lo is None or hi is None else hi - lo
            sign = c.get("sign_after")
            rows.append([i, c.get("time_iso"), _f(c.get("time")), _f(lo), _f(hi), _f(width),
                         _interval_text(c.get("noise_interval")) if c.get("resolved", True)
                         else f"not resolved: {c.get('reason')}",
                         _interval_text(c.get("systematic_interval")), _f(c.get("support"), ".2f"),
                         {1: "+ (outward)", -1: "\u2212 (inward)"}.get(sign, sign),
                         "final" if is_final else ""])
            classes.append("final" if is_final else "")
        title = {"dipole": "axial dipole (N \u2212 S)/2"}.get(pole, f"{pole} pole")
        parts.append(f"<h3>{title}</h3>")
        if rows:
            parts.append(table_html(["#", "epoch", "time (yr)", f"{pct} low (yr)", f"{pct} high (yr)", "width (yr)",
                                     f"noise {pct} (yr)", f"systematic {pct} (yr)", "support", "sign after", ""],
                                    rows, numeric={0, 2, 3, 4, 5, 8}, row_classes=classes))
        else:
            parts.append(note_html("no persistent sign change in the data"))
    bands = reversals.get("bands")
    if isinstance(bands, dict) and bands:
        rows = []
        for pole, by_boundary in bands.items():
            for boundary, res in (by_boundary or {}).items():
                fin = (res or {}).get("final") or {}
                rows.append([pole, boundary, len((res or {}).get("crossings") or []), fin.get("time_iso"),
                             _f(fin.get("time")), _f(fin.get("low")), _f(fin.get("high"))])
        pct = _level_text(reversals.get("north", {}).get("level") if isinstance(reversals.get("north"), dict)
                          else None)
        parts.append("<h3>Final reversal by cap boundary</h3>")
        parts.append(table_html(["pole", "|lat| \u2265 (deg)", "crossings", "final epoch", "time (yr)",
                                 f"{pct} low (yr)", f"{pct} high (yr)"], rows, numeric={1, 2, 4, 5, 6}))
    return "\n".join(parts)


def _window_text(detail: dict) -> str | None:
    centre, half = detail.get("time"), detail.get("window_years")
    if not isinstance(centre, (int, float)) or not isinstance(half, (int, float)):
        return None
    n = detail.get("n_rotations")
    return (f"{_f(centre - half)} \u2013 {_f(centre + half)} (centre {_f(centre)} \u00b1 {half:g} yr"
            + (f", {n} rotations)" if n is not None else ")"))


#: how each route takes the precursor (pipeline.precursor.precursor_at_phase)
_ROUTES = {"minimum": "window mean around the cycle minimum",
           "after_reversal": "window mean L years after the final dipole reversal"}


def precursor_statement(forecast: dict | None) -> str:
    """When and how the precursor was taken: phase, window, route, minimum and its status, target, data date.

    ``forecast`` is the forecast object or, when no forecast could be made,
    the state ``polecast run`` wrote in its place (the same keys, with
    ``forecast_unavailable``).  Old products without the state keys give a note.
    """
    f = forecast or {}
    if "phase" not in f and "precursor_detail" not in f:
        return note_html("the forecast product does not say when the precursor was taken")
    detail = f.get("precursor_detail") or {}
    phase = f.get("phase")
    lag = f.get("lag_years")
    if phase is None:
        when = "no phase could be taken"
    elif phase == "minimum":
        when = "minimum (the window around the cycle minimum)"
    else:
        when = f"{phase} ({_f(lag, 'g')} years after the final dipole reversal)"
    status = f.get("minimum_status")
    minimum = f.get("minimum_time")
    rows = [
        ["phase", when + ("" if not f.get("phase_requested") else f"; requested: {f['phase_requested']}")],
        ["window", _window_text(detail) or "none"],
        ["route", (f"{detail.get('route')}: {_ROUTES.get(detail.get('route'), '')}".rstrip(": ")
                   if detail.get("route") else "none") + (f"; precursor kind {detail['kind']}" if detail.get("kind")
                                                          else "")],
        ["final dipole reversal (yr)", _f(f.get("reversal_time"))
         + (" (provisional)" if f.get("reversal_provisional") else "")],
        ["cycle minimum (yr) and status", f"{_f(minimum)} ({status or 'not known'})"],
        ["target cycle (ordinal in the sunspot file)", f.get("target_cycle")],
        ["newest data used", f.get("data_date")],
        ["as of", f.get("as_of") or "all the data (no as-of date)"],
        ["source", f.get("precursor_source")],
    ]
    sunspots = f.get("sunspot_input") or {}
    if sunspots:
        rows.append(["sunspot numbers", f"version {sunspots.get('sunspot_number_version')} (declared); layout "
                     f"{sunspots.get('format')} ({sunspots.get('format_source')}); "
                     f"{sunspots.get('months_used')} months used"])
    out = table_html(["", ""], rows)
    reasons = f.get("provisional_reasons") or []
    notes = (f.get("phase_notes") or []) + [n for n in (f.get("notes") or []) if n not in (f.get("phase_notes") or [])]
    if reasons:
        out += "<ul>" + "".join(f"<li>may be revised: {_esc_text(r)}</li>" for r in reasons) + "</ul>"
    if notes:
        out += "<ul>" + "".join(f"<li>{_esc_text(n)}</li>" for n in notes) + "</ul>"
    return out


def forecast_table(forecast: dict | None) -> str:
    """The forecast: amplitude, intervals, method, cycles, r, leave-one-out RMSE, precursor and warnings.

    A forecast-state object (``forecast_unavailable`` set, no ``amplitude``)
    gives "No forecast" and the one-line reason instead.
    """
    if not forecast:
        return note_html("no forecast product (forecast.json): the forecast is left out")
    if forecast.get("forecast_unavailable") and forecast.get("amplitude") is None:
        out = (f"<p class=\"caution\"><strong>No forecast.</strong> "
               f"{_esc_text(forecast['forecast_unavailable'])}</p>")
        if forecast.get("cautions"):
            out += note_html(f"Caution (from the forecast): {forecast['cautions']}")
        return out
    i68 = forecast.get("interval_68") or [None, None]
    i95 = forecast.get("interval_95") or [None, None]
    pe = forecast.get("precursor_error")
    cal = forecast.get("calibrated_range") or [None, None]
    rows = [
        ["next-cycle amplitude (13-month smoothed sunspot number)", _f(forecast.get("amplitude"), ".1f")],
        ["68% prediction interval", f"{_f(i68[0], '.1f')} \u2013 {_f(i68[1], '.1f')}"],
        ["95% prediction interval", f"{_f(i95[0], '.1f')} \u2013 {_f(i95[1], '.1f')}"],
        ["method", forecast.get("method")],
        ["calibration cycles (n_cycles)", forecast.get("n_cycles")],
        ["Pearson r of the calibration", _f(forecast.get("r"), ".3f")],
        ["leave-one-out RMSE (sunspot number)", _f(forecast.get("loo_rmse"), ".1f")],
        ["precursor (G)", _f(forecast.get("precursor"), ".4g") + ("" if pe is None else f" \u00b1 {_f(pe, '.2g')}")],
        ["calibrated precursor range (G)", f"{_f(cal[0], '.4g')} \u2013 {_f(cal[1], '.4g')}"],
        ["newest data used", forecast.get("data_date")],
        ["precursor source", forecast.get("precursor_source")],
    ]
    if forecast.get("scale") is not None or forecast.get("calibration_scale") is not None:
        rows.append(["scale in force", forecast.get("scale") or "not declared"])
        rows.append(["calibration scale", forecast.get("calibration_scale") or "not declared"])
    override = forecast.get("scale_override")
    if isinstance(override, dict):
        rows.append(["scale override", override.get("message")])
    warnings = forecast.get("warnings") or []
    rows.append(["warnings", "; ".join(map(str, warnings)) if warnings else "none"])
    out = table_html(["quantity", "value"], rows)
    if forecast.get("cautions"):
        out += note_html(f"Caution (from the forecast): {forecast['cautions']}")
    return out


def truth_table(summary: dict | None, reversals: dict | None, forecast: dict | None) -> str:
    """Truth of the synthetic star against what the pipeline recovered (demo only), or ''."""
    truth = (summary or {}).get("truth")
    if not isinstance(truth, dict):
        return ""
    rows = []
    for pole in ("north", "south", "dipole"):
        t = (truth.get("reversals") or {}).get(pole)
        if t is None and pole == "dipole":
            continue
        fin = ((reversals or {}).get(pole) or {}).get("final") or {}
        got = fin.get("time")
        diff = None if t is None or got is None else got - t
        inside = None
        if t is not None and fin.get("low") is not None and fin.get("high") is not None:
            inside = "yes" if fin["low"] <= t <= fin["high"] else "no"
        rows.append([f"final {pole} reversal (yr)", _f(t), _f(got),
                     f"{_level_text(fin.get('level'))}: {_f(fin.get('low'))} \u2013 {_f(fin.get('high'))}",
                     _f(diff), inside])
    amp = truth.get("next_amplitude")
    f = forecast or {}
    i95 = f.get("interval_95") or [None, None]
    got = f.get("amplitude")
    inside = None
    if amp is not None and None not in i95:
        inside = "yes" if i95[0] <= amp <= i95[1] else "no"
    rows.append(["next-cycle amplitude", _f(amp, ".1f"), _f(got, ".1f"),
                 f"{_f(i95[0], '.1f')} \u2013 {_f(i95[1], '.1f')} (95%)",
                 _f(None if amp is None or got is None else got - amp, ".1f"), inside])
    return table_html(["quantity", "truth", "recovered", "interval", "recovered \u2212 truth", "truth inside?"],
                      rows, numeric={1, 2, 4})


def cycles_table(cycles: dict | None) -> str:
    """Cycle minima and maxima of the ``polecast cycles`` object."""
    if not cycles:
        return note_html("no cycles product (cycles.json): cycle minima and maxima are not marked")
    rows = [[i, _f(c.get("minimum_time")), _f(c.get("minimum_value"), ".1f"), _f(c.get("maximum_time")),
             _f(c.get("maximum_value"), ".1f")] for i, c in enumerate(cycles.get("cycles") or [], start=1)]
    if not rows:
        return note_html("no cycle minimum in the sunspot series")
    return table_html(["#", "minimum (yr)", "minimum value", "maximum (yr)", "maximum value"], rows,
                      numeric={0, 1, 2, 3, 4})


def calibration_rows_table(table) -> str:
    """The calibration cycles used."""
    if table is None:
        return note_html("no calibration product (calibration.csv): the calibration figure is left out")
    errors = [(name, arr) for name, arr in (("precursor error (G)", table.precursor_error),
                                            ("amplitude error", table.amplitude_error)) if arr is not None]
    phases = getattr(table, "phase", None) or ("",) * len(table.cycle)
    rows = []
    for i, name in enumerate(table.cycle):
        row = [name, phases[i], _f(float(table.precursor[i]), ".4g"), _f(float(table.amplitude[i]), ".1f")]
        row += [_f(float(arr[i]), ".3g") for _, arr in errors]
        rows.append(row)
    headers = ["cycle", "phase", "precursor (G)", "amplitude"] + [h for h, _ in errors]
    return table_html(headers, rows, numeric=set(range(2, len(headers))))


def skipped_table(skipped: list, max_rows: int) -> str:
    """Every skipped file with its one-line reason (escaped), up to ``max_rows``."""
    if not skipped:
        return note_html("no skipped file")
    rows = [[path, reason] for path, reason in skipped[:max_rows]]
    out = table_html(["file", "reason"], rows)
    if len(skipped) > max_rows:
        out += note_html(f"{len(skipped) - max_rows} more skipped files not listed (report.max_table_rows = "
                         f"{max_rows})")
    return out


def store_table(summary: dict) -> str:
    """Counts and ranges of the store."""
    rows = [["store", summary.get("store")], ["measured frames (ok)", summary.get("ok")],
            ["skipped files", summary.get("skipped")], ["first frame", summary.get("first_time")],
            ["last frame", summary.get("last_time")], ["superseded contents", summary.get("superseded")],
            ["measure configurations", ", ".join(f"{k}: {v}" for k, v in (summary.get("configs") or {}).items())],
            ["polecast versions that measured", ", ".join(f"{k}: {v}" for k, v in
                                                         (summary.get("versions") or {}).items())]]
    return table_html(["", ""], rows)


def versions_table(versions: dict) -> str:
    return table_html(["package", "version"], [[k, v] for k, v in versions.items()])


def _figure_or_note(figures: dict, key: str, caption: str, alt: str, missing: str) -> str:
    if key in figures:
        return figure_html(figures[key], caption, alt)
    return note_html(missing)


def _number_of(x):
    return x if isinstance(x, (int, float)) and not (isinstance(x, float) and not math.isfinite(x)) else None


def assemble_page(*, settings, store_path: str, products_dir: str | None, products, store_summary: dict,
                  skipped: list, figures: dict, config_dict: dict, versions: dict, generated_utc: str) -> str:
    """The whole page from the products, the store's summary and skipped files, and the drawn figures."""
    fc = products.forecast or {}
    headline = []
    if _number_of(fc.get("amplitude")) is not None:
        i95 = fc.get("interval_95") or [None, None]
        headline.append(f"Next-cycle amplitude {_f(fc['amplitude'], '.0f')} (95%: {_f(i95[0], '.0f')} \u2013 "
                        f"{_f(i95[1], '.0f')}).")
    for pole in ("north", "south"):
        fin = ((products.reversals or {}).get(pole) or {}).get("final")
        if fin:
            headline.append(f"Final {pole} reversal {fin.get('time_iso')} ({_level_text(fin.get('level'))}: "
                            f"{_f(fin.get('low'))} \u2013 {_f(fin.get('high'))}).")
    sections = []
    if fc.get("forecast_unavailable") and _number_of(fc.get("amplitude")) is None:
        headline.insert(0, f"No forecast: {fc['forecast_unavailable']}")
    summary_body = ("<p>" + " ".join(map(_esc_text, headline)) + "</p>") if headline else note_html(
        "no forecast or final reversal yet")
    truth = truth_table(products.summary, products.reversals, products.forecast)
    if truth:
        summary_body += "<h3>Demo: truth of the synthetic star against what was recovered</h3>" + truth
    if products.notes:
        summary_body += "<h3>Notes on the products</h3><ul>" + "".join(
            f"<li>{_esc_text(n)}</li>" for n in products.notes) + "</ul>"
    sections.append(("summary", "Summary", summary_body))
    sections.append(("series", "Polar-field series and reversals",
                     figure_html(figures["series"], "North and south polar-cap mean Br and the axial dipole "
                                 "(N \u2212 S)/2 per Carrington rotation with one-sigma error bars and the smoothed "
                                 "curves; shaded spans are the 90% reversal intervals (noise and the ensemble of "
                                 "analysis choices), heavy lines the final reversals, "
                                 "dashed/dash-dot lines the cycle minima/maxima, the hatched span the window the "
                                 "precursor was taken in.", "polar-field series")
                     + reversal_tables(products.reversals)))
    sections.append(("latitude-time", "Latitude-time diagram",
                     figure_html(figures["latitude_time"], "Longitude-averaged radial field per latitude bin and "
                                 "rotation (gauss, colour scale symmetric about zero); dashed lines mark the polar-cap "
                                 "boundary.", "latitude-time diagram")))
    sections.append(("forecast", "Forecast",
                     forecast_table(products.forecast)
                     + "<h3>When and how the precursor was taken</h3>" + precursor_statement(products.forecast)
                     + _figure_or_note(figures, "calibration", "Calibration cycles (precursor against next-cycle "
                                       "amplitude), the fitted line with its 68% and 95% prediction bands, and this "
                                       "cycle's forecast with its 68% (thick) and 95% (thin) intervals.",
                                       "calibration", "calibration figure left out (no calibration.csv)")
                     + "<h3>Calibration cycles</h3>" + calibration_rows_table(products.calibration)
                     + "<h3>Cycle minima and maxima</h3>" + cycles_table(products.cycles)))
    sections.append(("history", "Forecast history",
                     _figure_or_note(figures, "history", "The forecast amplitude at each update against the date "
                                     "of the newest data used, with its 68% and 95% intervals; one line per target "
                                     "cycle (updates forecasting different cycles are never joined).",
                                     "forecast history",
                                     "no forecast history (forecast_history.jsonl missing or empty)")
                     + "<h3>Forecast trajectory</h3>"
                     + _figure_or_note(figures, "trajectory", "The forecast as it would have been made as of each "
                                       "date, using only the data before it (the run's own phase rule and "
                                       "calibration): amplitude with its 68% and 95% intervals against the date of "
                                       "the newest data used, one line per target cycle, labelled with the phase; "
                                       "dashed: the amplitude the target turned out to have (the synthetic star's "
                                       "truth, or the smoothed maximum once the sunspot series has it); ticks at the "
                                       "bottom: dates without a forecast.", "forecast trajectory",
                                       "no forecast trajectory (trajectory.json: set [run] trajectory_step_months)")
                     + _trajectory_notes(products.trajectory)
                     + "<h3>Hindcast skill against phase</h3>"
                     + _figure_or_note(figures, "skill", "Hindcasts of past cycles (each forecast as of the first "
                                       "date its phase's window was complete, with data before then only and a "
                                       "calibration without the target): RMSE and bias of the forecasts against "
                                       "the amplitudes that followed, and the fraction of those amplitudes inside "
                                       "the 68% and 95% intervals (dashed: the nominal levels), per phase.",
                                       "hindcast skill against phase",
                                       "no hindcast product: the skill-against-phase figure is left out (save "
                                       "`polecast hindcast --phase PHASE --format json` outputs as "
                                       "PRODUCTS/hindcasts/PHASE.json)")
                     + _skill_table(products.hindcasts)))
    sections.append(("diagnostics", "Diagnostics",
                     figure_html(figures["diagnostics"], "B0 angle and polar-cap coverage per frame; skipped files "
                                 "grouped by reason.", "diagnostics")
                     + "<h3>Store</h3>" + store_table(store_summary)
                     + f"<h3>Skipped files ({len(skipped)})</h3>" + skipped_table(skipped, settings.max_table_rows)))
    sections.append(("provenance", "Configuration and versions",
                     "<h3>Versions</h3>" + versions_table(versions)
                     + "<h3>Configuration used</h3>" + json_block(config_dict)))
    meta = (f"Generated {generated_utc} by polecast {versions.get('polecast')} from store {store_path}"
            + (f" and products {products_dir}" if products_dir else "") + ".")
    return page_html(settings.title, meta, list(CAUTION_TEXTS), sections)


def _skill_table(hindcasts: list | None) -> str:
    """The skill of each hindcast product, one row per phase."""
    if not hindcasts:
        return ""
    rows = []
    for h in hindcasts:
        k = h.get("skill") or {}
        rows.append([h.get("phase"), k.get("n"), _f(k.get("r"), ".2f"), _f(k.get("rmse"), ".1f"),
                     _f(k.get("bias"), "+.1f"), _f(k.get("median_relative_error"), "+.3f"),
                     _f(k.get("coverage_68"), ".2f"), _f(k.get("coverage_95"), ".2f"), h.get("source")])
    return table_html(["phase", "n", "r", "RMSE", "bias", "median relative error", "68% coverage",
                       "95% coverage", "product"], rows, numeric={1, 2, 3, 4, 5, 6, 7})


def _trajectory_notes(trajectory: dict | None) -> str:
    """The reasons of the trajectory's dates without a forecast, each distinct reason once with its dates."""
    rows = (trajectory or {}).get("rows") or []
    reasons: dict = {}
    for r in rows:
        if isinstance(r, dict) and r.get("amplitude") is None and r.get("forecast_unavailable"):
            reasons.setdefault(str(r["forecast_unavailable"]), []).append(str(r.get("as_of")))
    if not reasons:
        return ""
    items = [f"<li>as of {_esc_text(d[0])}" + (f" to {_esc_text(d[-1])} ({len(d)} dates)" if len(d) > 1 else "")
             + f": {_esc_text(reason)}</li>" for reason, d in reasons.items()]
    return "<h4>Dates without a forecast</h4><ul>" + "".join(items) + "</ul>"


def _esc_text(text: str) -> str:
    from pipeline.report.html import esc

    return esc(text)
