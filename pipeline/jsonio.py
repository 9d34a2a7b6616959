"""Product files shared by every stage: JSON with nulls for non-finite floats, and atomic replacement.

Every product is written to a temporary file in its own folder and then
renamed into place (:func:`atomic_output`), so a reader never sees a
half-written product and a crash in the middle of writing leaves the old one
intact.
"""

from __future__ import annotations

import json
import math
import os
import secrets
from contextlib import contextmanager
from pathlib import Path

__all__ = ["finite_or_none", "write_json", "write_text", "atomic_output", "TEMP_SUFFIX"]

#: name ending of the temporary files of :func:`atomic_output` (``.NAME.<random>.tmp``)
TEMP_SUFFIX = ".tmp"


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


def _fsync_dir(folder: Path) -> None:
    fd = os.open(folder, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


@contextmanager
def atomic_output(path: str | os.PathLike):
    """Write a file through a temporary file in the same folder, renamed into place on success.

    Parameters
    ----------
    path : path-like
        The final file.  Its folder must exist.

    Yields
    ------
    pathlib.Path
        A fresh path (``FOLDER/.NAME.<random>.tmp``, not yet created) to
        write the whole content to.

    Notes
    -----
    On success the temporary file is flushed to disk (``fsync``) and renamed
    over ``path`` with :func:`os.replace`, which POSIX makes atomic within
    one file system (IEEE Std 1003.1, ``rename()``): a reader sees either the
    old file or the new one, never a mix.  On any exception (including
    KeyboardInterrupt) the temporary file is removed and ``path`` is left as
    it was.
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{os.getpid()}-{secrets.token_hex(4)}{TEMP_SUFFIX}")
    try:
        yield tmp
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    _fsync_dir(path.parent)


def write_text(path: str | os.PathLike, text: str) -> None:
    """Write ``text`` (UTF-8) to ``path`` atomically (:func:`atomic_output`)."""
    with atomic_output(path) as tmp:
        tmp.write_text(text, encoding="utf-8")


def write_json(path: str | os.PathLike, obj) -> None:
    """Write ``obj`` as indented JSON (nulls for non-finite numbers) with a final newline, atomically.

    The JSON is streamed into the temporary file of :func:`atomic_output`;
    an object that cannot be serialised raises TypeError (or ValueError)
    and leaves ``path`` as it was.
    """
    with atomic_output(path) as tmp:
        with open(tmp, "w", encoding="utf-8") as fh:
            json.dump(finite_or_none(obj), fh, indent=1, allow_nan=False)
            fh.write("\n")
