"""Append-only forecast history (JSON Lines).

Each forecast run with ``--history FILE`` appends one JSON object on its own
line: the date of the newest data used, the precursor and the forecast.  The
file is only ever opened in append mode, so earlier entries are never
rewritten and a forecaster sees the forecast evolve month by month.  Each
append holds an exclusive ``flock`` on the file while it writes its line, so
two writers never interleave their bytes (``polecast run`` also holds its
run lock over the whole run, :mod:`pipeline.run`).
"""

from __future__ import annotations

import datetime as _dt
import fcntl
import json
import os
from pathlib import Path
from pipeline.jsonio import finite_or_none

__all__ = ["HISTORY_KEYS", "history_entry", "append_history", "read_history"]

#: keys of every history entry, in order
HISTORY_KEYS = ("data_date", "written_utc", "precursor", "precursor_error", "amplitude", "interval_68",
                "interval_95", "method", "n_cycles", "r", "loo_rmse", "calibration", "precursor_source")


def history_entry(forecast: dict, data_date: str, *, calibration: str | None = None,
                  precursor_source: str = "given", written_utc: str | None = None) -> dict:
    """One history entry from a forecast dict (``Forecast.to_dict()``).

    Parameters
    ----------
    forecast : dict
        At least ``precursor``, ``amplitude``, ``interval_68``, ``interval_95``,
        ``method``, ``n_cycles``.
    data_date : str
        ISO date (``YYYY-MM-DD``) of the newest data used.
    calibration : str, optional
        Name of the calibration table used.
    precursor_source : str
        How the precursor was obtained (``given``, ``store``).
    written_utc : str, optional
        When the entry was made (ISO 8601 UTC); now by default.
    """
    try:
        _dt.date.fromisoformat(str(data_date)[:10])
    except ValueError:
        raise ValueError(f"data_date: got {data_date!r}; expected an ISO date YYYY-MM-DD") from None
    if written_utc is None:
        written_utc = _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%SZ")
    entry = {
        "data_date": str(data_date)[:10],
        "written_utc": written_utc,
        "precursor": forecast["precursor"],
        "precursor_error": forecast.get("precursor_error"),
        "amplitude": forecast["amplitude"],
        "interval_68": list(forecast["interval_68"]),
        "interval_95": list(forecast["interval_95"]),
        "method": forecast["method"],
        "n_cycles": forecast["n_cycles"],
        "r": forecast.get("r"),
        "loo_rmse": forecast.get("loo_rmse"),
        "calibration": calibration,
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
