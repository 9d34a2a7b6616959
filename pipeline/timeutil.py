"""Time conversions shared by every stage: datetime64 <-> decimal year, ISO strings.

A decimal year is ``year + (t - start of year) / (length of that year)``, with
both in UTC days (common practice, no source; e.g. 2001-07-02T12:00 is
2001.5).  Inputs may be scalars or arrays.
"""

from __future__ import annotations

import numpy as np

__all__ = ["to_datetime64", "decimal_year", "from_decimal_year", "iso_date", "iso_time"]


def to_datetime64(value) -> np.ndarray:
    """ISO strings, datetime64 or datetime objects -> ``datetime64[ns]`` (UTC).

    A trailing ``Z`` is accepted.
    """
    arr = np.asarray(value)
    if arr.dtype.kind in ("U", "S", "O"):
        flat = [str(v).strip().rstrip("Z") for v in arr.ravel()]
        return np.array(flat, dtype="datetime64[ns]").reshape(arr.shape)
    return arr.astype("datetime64[ns]")


def decimal_year(t) -> np.ndarray | float:
    """datetime64 (or ISO strings) -> decimal year (float)."""
    t = to_datetime64(t)
    year = t.astype("datetime64[Y]")
    start = year.astype("datetime64[ns]")
    end = (year + np.timedelta64(1, "Y")).astype("datetime64[ns]")
    frac = (t - start).astype(np.float64) / (end - start).astype(np.float64)
    out = year.astype(np.int64) + 1970 + frac
    return float(out) if np.ndim(out) == 0 else out


def from_decimal_year(y) -> np.ndarray:
    """Decimal year -> ``datetime64[ns]`` (inverse of :func:`decimal_year`)."""
    y = np.asarray(y, dtype=np.float64)
    whole = np.floor(y)
    start = (whole.astype(np.int64) - 1970).astype("datetime64[Y]")
    length = ((start + np.timedelta64(1, "Y")).astype("datetime64[ns]") - start.astype("datetime64[ns]"))
    return start.astype("datetime64[ns]") + (length.astype(np.float64) * (y - whole)).astype("timedelta64[ns]")


def iso_date(t) -> str:
    """``YYYY-MM-DD`` of a datetime64 (or decimal year float)."""
    if isinstance(t, (float, np.floating)):
        t = from_decimal_year(t)
    return str(np.datetime64(to_datetime64(t), "D"))


def iso_time(t) -> str:
    """ISO 8601 UTC with millisecond precision and a ``Z``."""
    return str(np.datetime64(to_datetime64(t), "ms")) + "Z"
