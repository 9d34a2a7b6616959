"""The systematic ensemble of the reversal epochs: defensible analysis choices re-run on the measured records.

A reversal epoch depends on choices that no datum settles: how the hidden
part of the far cap is handled (the B0 method), where the cap begins, how
much the series is smoothed and whether the magnetograms' zero offset is
taken out.  :func:`store_reversals` re-runs each choice on the *same*
records (nothing is re-measured: the records carry their latitude profiles,
their zero-offset estimate and the means of 1/mu that undo or apply it) and
hands the members to :func:`pipeline.reversal.find_reversals`, whose
systematic interval is the range of their epochs.

Members (each named in the output's ``ensemble``):

``b0_method=<m>``
    The other whole-cap B0 methods (``fill``, ``profile``, ``season``) that
    the records support.  ``visible`` is not a member: it estimates the mean
    of the visible part of the cap, a different quantity.
``cap_latitude=<L +- 5>``
    The cap boundary 5 deg lower and higher (``fill`` and ``profile``, which
    compute the whole-cap mean from the latitude profiles; ``fill`` needs
    profiles down to the lower boundary).  The record's own cap means
    (``visible``, ``season``) cannot move their boundary.
``zero_offset=<other>``
    The other zero-offset treatment (:func:`pipeline.zero_offset.toggle_records`).
``smoothing_width_x0.5``, ``smoothing_width_x2``
    Added by :func:`pipeline.reversal.find_reversals` itself.

A member that does not apply is listed in ``members_skipped`` with its
reason, never silently dropped.  Latitude bands get the smoothing and
zero-offset members (their cap boundary is the band itself, and the B0
handling of the band means is the fill of the latitude-time diagram).
"""

from __future__ import annotations

import dataclasses

from pipeline.b0 import MixedRecordsError, common_cap_latitude
from pipeline.config import ConfigError

__all__ = ["WHOLE_CAP_METHODS", "CAP_SHIFT_DEG", "series_members", "band_inputs", "store_reversals"]

#: B0 methods that estimate the whole-cap mean (the members of one another's ensemble).
WHOLE_CAP_METHODS = ("fill", "profile", "season")

#: The cap boundary members: this far below and above the boundary in force (degrees).
CAP_SHIFT_DEG = 5.0


def _one_line(exc) -> str:
    return " ".join(str(exc).split())


def _zero_offset_state(records):
    """``(applied, estimated)``: whether the records' means are offset-corrected, and whether any has an estimate."""
    applied = any(bool(getattr(r, "zero_offset_applied", False)) for r in records)
    estimated = any(getattr(r, "zero_offset_gauss", None) is not None for r in records)
    return applied, estimated


def _toggled(records):
    """The records under the other zero-offset treatment, its member name, or ``(None, name, reason)``."""
    from pipeline.zero_offset import toggle_records

    applied, estimated = _zero_offset_state(records)
    name = "zero_offset=none" if applied else "zero_offset=corrected"
    if not estimated:
        return None, name, "the records carry no zero-offset estimate (measured before it was recorded)"
    return toggle_records(records, not applied), name, None


def series_members(records, series_settings):
    """The ensemble members' PolarSeries built from the records.

    Parameters
    ----------
    records : list of pipeline.measure.FrameRecord
    series_settings : pipeline.aggregator.SeriesSettings
        The settings in force (the primary analysis).

    Returns
    -------
    members : dict
        ``{name: xarray.Dataset}``.
    skipped : dict
        ``{name: reason}`` for the members that do not apply.
    """
    from pipeline.aggregator import polar_series

    members, skipped = {}, {}
    primary = series_settings.b0_method

    def build(name, settings, recs=records):
        try:
            members[name] = polar_series(recs, settings)
        except (ConfigError, MixedRecordsError, ValueError) as exc:
            skipped[name] = _one_line(exc)

    for m in WHOLE_CAP_METHODS:
        if m != primary:
            build(f"b0_method={m}", dataclasses.replace(series_settings, b0_method=m))
    cap = series_settings.cap_latitude_deg
    if cap is None:
        try:
            cap = common_cap_latitude(records)
        except MixedRecordsError:
            cap = None
    for shift in (-CAP_SHIFT_DEG, CAP_SHIFT_DEG):
        if cap is None:
            continue
        name = f"cap_latitude={cap + shift:g}"
        if primary not in ("fill", "profile"):
            skipped[name] = (f"b0_method {primary!r} uses the records' own cap means, measured over one cap; "
                             f"only 'fill' and 'profile' can move the boundary")
            continue
        build(name, dataclasses.replace(series_settings, cap_latitude_deg=float(cap + shift)))
    toggled, name, why = _toggled(records)
    if toggled is None:
        skipped[name] = why
    else:
        build(name, series_settings, toggled)
    return members, skipped


def band_inputs(records, series_settings, diagram=None, members: bool = True):
    """Band cap means, their fill errors, and the zero-offset member's band means.

    Parameters
    ----------
    records : list of pipeline.measure.FrameRecord
    series_settings : pipeline.aggregator.SeriesSettings
    diagram : xarray.DataArray, optional
        The records' :func:`pipeline.aggregator.latitude_time_diagram`, when the caller has it already.
    members : bool
        Build the zero-offset member (False: the ensemble is off).

    Returns
    -------
    means : dict
        ``{"north": {L: DataArray}, "south": {...}}`` (gauss).
    errors : dict or None
        Same shape: correlated (fill) one-sigma errors, or None when not filled.
    members : dict
        ``{name: band-means dict}``.
    skipped : dict
        ``{name: reason}``.
    """
    from pipeline.aggregator import (band_cap_fill_errors, band_cap_means, filled_diagram, filled_diagram_error,
                                     latitude_time_diagram)

    def means_of(diag):
        if series_settings.b0_method != "fill":
            return band_cap_means(diag), None
        gap = series_settings.fill_max_gap_years
        return (band_cap_means(filled_diagram(diag, gap)),
                band_cap_fill_errors(filled_diagram_error(diag, gap)))

    if diagram is None:
        diagram = latitude_time_diagram(records, series_settings)
    means, errors = means_of(diagram)
    band_members, skipped = {}, {}
    if not members:
        return means, errors, band_members, skipped
    toggled, name, why = _toggled(records)
    if toggled is None:
        skipped[name] = why
    else:
        try:
            band_members[name] = means_of(latitude_time_diagram(toggled, series_settings))[0]
        except (ConfigError, MixedRecordsError, ValueError) as exc:
            skipped[name] = _one_line(exc)
    return means, errors, band_members, skipped


def store_reversals(records, series, config, diagram=None) -> dict:
    """The reversal document of a store's records: poles, dipole and bands, each with the full ensemble.

    Parameters
    ----------
    records : list of pipeline.measure.FrameRecord
        The measured records (status ``"ok"``).
    series : xarray.Dataset
        Their PolarSeries under ``config.series`` (:func:`pipeline.aggregator.polar_series`).
    config : pipeline.config.Config
        Uses ``series`` and ``reversals``.
    diagram : xarray.DataArray, optional
        Their latitude-time diagram, when the caller has made it (not made twice).

    Returns
    -------
    dict
        ``{"north": ..., "south": ..., "dipole": ..., "bands": {"north": {"55": ...}, ...}}``,
        each a :meth:`pipeline.reversal.ReversalResult.to_dict`.
    """
    from pipeline.reversal import band_reversals, series_reversals

    smoother = config.series.smoother
    rs = config.reversals
    members, skipped = (series_members(records, config.series) if rs.systematics else ({}, {}))
    out = {k: v.to_dict() for k, v in series_reversals(series, rs, smoother, members, skipped).items()}
    means, errors, band_members, band_skipped = band_inputs(records, config.series, diagram, rs.systematics)
    bands = band_reversals(means, rs, smoother, band_members, errors, band_skipped)
    out["bands"] = {pole: {b: r.to_dict() for b, r in d.items()} for pole, d in bands.items()}
    return out
