"""JSON output shared by every stage: non-finite floats become null, files end with a newline."""

from __future__ import annotations

import json
import math
from pathlib import Path

__all__ = ["finite_or_none", "write_json"]


def finite_or_none(value):
    """``value`` with every NaN or infinite float (in lists, tuples, dicts) replaced by None.

    JSON has no NaN (RFC 8259, section 6), so missing numbers are written as null.
    """
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, (list, tuple)):
        return [finite_or_none(v) for v in value]
    if isinstance(value, dict):
        return {k: finite_or_none(v) for k, v in value.items()}
    return value


def write_json(path: str | Path, obj) -> None:
    """Write ``obj`` as indented JSON (nulls for non-finite numbers) with a final newline."""
    Path(path).write_text(json.dumps(finite_or_none(obj), indent=1) + "\n", encoding="utf-8")
