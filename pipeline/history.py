"""Append-only forecast history (JSON Lines).

Each forecast run with ``--history FILE`` (and each ``polecast run`` that makes
a forecast) appends one JSON object on its own line: the date of the newest
data used, the precursor with its phase, the minimum and target cycle it
stands for, the calibration used (its content digest and declared scale) and
the forecast.  The file is only ever opened in append mode, so earlier entries
are never rewritten and a forecaster sees the forecast evolve month by month.
Each append holds an exclusive ``flock`` on the file while it writes its line,
so two writers never interleave their bytes (``polecast run`` also holds its
run lock over the whole run, :mod:`pipeline.run`).

Entries written before the phase keys existed lack them; readers treat a
missing key as unknown (null).
"""

from __future__ import annotations

import datetime as _dt
import fcntl
import json
import os
from pathlib import Path
from pipeline.jsonio import finite_or_none

__all__ = ["HISTORY_KEYS", "history_entry", "calibration_identity", "declared_calibration_scale",
           "append_history", "read_history"]

#: keys of every history entry, in order
HISTORY_KEYS = ("data_date", "written_utc", "as_of", "phase", "lag_years", "minimum_time", "minimum_status",
                "reversal_time", "target_cycle", "precursor", "precursor_error", "scale", "amplitude", "interval_68",
                "interval_95", "method", "n_cycles", "r", "loo_rmse", "calibration", "calibration_digest",
                "calibration_scale", "precursor_source")


def declared_calibration_scale(table, phase: str | None) -> str | None:
    """The scale the calibration rows of ``phase`` declare (their ``scale`` column), or None.

    Parameters
    ----------
    table : pipeline.regression.CalibrationTable
    phase : str or None
        Only rows of this phase count (:func:`pipeline.regression.select_phase`);
        None counts every row.

    Returns
    -------
    str or None
        The first spelling of each distinct declared scale
        (:func:`pipeline.regression.normalise_scale` decides which are the
        same), joined by `` | `` when the rows declare several; None when no
        row declares one.
    """
    from pipeline.regression import normalise_scale, select_phase

    rows = table if phase is None else select_phase(table, phase)
    seen: dict[str, str] = {}
    for s in rows.scale:
        key = normalise_scale(s)
        if key and key not in seen:
            seen[key] = str(s).strip()
    return " | ".join(seen.values()) if seen else None


def calibration_identity(path, phase: str | None = None) -> dict:
    """``calibration_digest`` and ``calibration_scale`` of a calibration file.

    Parameters
    ----------
    path : path-like
        The calibration CSV.
    phase : str, optional
        The forecast's phase: the scale is that of the rows of this phase.

    Returns
    -------
    dict
        ``calibration_digest``: hex BLAKE2b-256 of the file's bytes (RFC 7693,
        :func:`pipeline.store.file_digest`, the digest the store keeps of every
        magnetogram); ``calibration_scale``: :func:`declared_calibration_scale`.
        Both None when the file cannot be read (it may have moved since).
    """
    from pipeline.regression import read_calibration_csv
    from pipeline.store import file_digest

    try:
        digest = file_digest(path)
        scale = declared_calibration_scale(read_calibration_csv(path), phase)
    except (OSError, ValueError):  # unreadable or not a calibration table: the identity is unknown
        return {"calibration_digest": None, "calibration_scale": None}
    return {"calibration_digest": digest, "calibration_scale": scale}


_UNSET = object()


def history_entry(forecast: dict, data_date: str, *, calibration: str | None = None,
                  precursor_source: str = "given", written_utc: str | None = None,
                  calibration_digest=_UNSET, calibration_scale=_UNSET) -> dict:
    """One history entry from a forecast dict (``Forecast.to_dict()`` plus the as-of state keys).

    Parameters
    ----------
    forecast : dict
        At least ``precursor``, ``amplitude``, ``interval_68``, ``interval_95``,
        ``method``, ``n_cycles``; the state keys of
        :meth:`pipeline.asof.ForecastInputs.to_dict` (``phase``,
        ``lag_years``, ``minimum_time``, ``minimum_status``, ``reversal_time``,
        ``target_cycle``, ``as_of``) and ``scale`` are copied when present
        (null otherwise).
    data_date : str
        ISO date (``YYYY-MM-DD``) of the newest data used.
    calibration : str, optional
        Name (path) of the calibration table used.
    precursor_source : str
        How the precursor was obtained (``given``, ``store``, ``series``).
    written_utc : str, optional
        When the entry was made (ISO 8601 UTC); now by default.
    calibration_digest, calibration_scale : str or None, optional
        The calibration file's content digest and declared scale; when not
        given they are read from the file ``calibration`` names
        (:func:`calibration_identity`, null when it cannot be read).

    Returns
    -------
    dict
        The keys of :data:`HISTORY_KEYS`, in that order; NaN written as null.
    """
    try:
        _dt.date.fromisoformat(str(data_date)[:10])
    except ValueError:
        raise ValueError(f"data_date: got {data_date!r}; expected an ISO date YYYY-MM-DD") from None
    if written_utc is None:
        written_utc = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    if calibration_digest is _UNSET or calibration_scale is _UNSET:
        found = (calibration_identity(calibration, forecast.get("phase")) if calibration
                 else {"calibration_digest": None, "calibration_scale": None})
        if calibration_digest is _UNSET:
            calibration_digest = found["calibration_digest"]
        if calibration_scale is _UNSET:
            calibration_scale = found["calibration_scale"]
    entry = {
        "data_date": str(data_date)[:10],
        "written_utc": written_utc,
        "as_of": forecast.get("as_of"),
        "phase": forecast.get("phase"),
        "lag_years": forecast.get("lag_years"),
        "minimum_time": forecast.get("minimum_time"),
        "minimum_status": forecast.get("minimum_status"),
        "reversal_time": forecast.get("reversal_time"),
        "target_cycle": forecast.get("target_cycle"),
        "precursor": forecast["precursor"],
        "precursor_error": forecast.get("precursor_error"),
        "scale": forecast.get("scale"),
        "amplitude": forecast["amplitude"],
        "interval_68": list(forecast["interval_68"]),
        "interval_95": list(forecast["interval_95"]),
        "method": forecast["method"],
        "n_cycles": forecast["n_cycles"],
        "r": forecast.get("r"),
        "loo_rmse": forecast.get("loo_rmse"),
        "calibration": calibration,
        "calibration_digest": calibration_digest,
        "calibration_scale": calibration_scale,
        "precursor_source": precursor_source,
    }
    return {k: finite_or_none(v) for k, v in entry.items()}


def append_history(path: str | Path, entry: dict) -> None:
    """Append one entry as a JSON line; never rewrites what is already there.

    If the file's last line is incomplete (an earlier crash), the new entry
    starts on a new line so that both stay readable.  The line is written in
    one ``write`` while an exclusive ``flock`` is held on the file (waiting
    for another writer's append to finish), so concurrent appends never mix.

    Raises
    ------
    ValueError
        When the file cannot be written.
    """
    path = Path(path)
    line = json.dumps(entry, sort_keys=False, allow_nan=False) + "\n"
    try:
        # open in append mode only: the bytes already in the file are never touched
        with open(path, "ab") as fh:
            fcntl.flock(fh.fileno(), fcntl.LOCK_EX)  # released when the file is closed
            if os.fstat(fh.fileno()).st_size > 0:
                with open(path, "rb") as probe:
                    probe.seek(-1, os.SEEK_END)
                    if probe.read(1) != b"\n":
                        line = "\n" + line
            fh.write(line.encode("utf-8"))
            fh.flush()
            os.fsync(fh.fileno())
    except OSError as exc:
        raise ValueError(f"history file {path}: cannot append ({exc}); choose a writable path") from None


def read_history(path: str | Path) -> tuple[list[dict], list[str]]:
    """Read a history file: (entries in file order, one-line reasons for unreadable lines)."""
    path = Path(path)
    entries, problems = [], []
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        return entries, problems
    except (OSError, UnicodeDecodeError) as exc:
        raise ValueError(f"history file {path}: cannot read ({exc})") from None
    for lineno, line in enumerate(text.splitlines(), start=1):
        if not line.strip():
            continue
        try:
            obj = json.loads(line)
        except json.JSONDecodeError as exc:
            problems.append(f"line {lineno}: not a JSON object ({exc.msg}); left out")
            continue
        if not isinstance(obj, dict):
            problems.append(f"line {lineno}: not a JSON object; left out")
            continue
        entries.append(obj)
    return entries, problems
