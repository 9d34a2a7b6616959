"""pipeline.jsonio: JSON products (null for non-finite numbers) written atomically."""

import json
import math
import os
import stat

import numpy as np
import pytest

from pipeline.jsonio import atomic_output, finite_or_none, write_json, write_text


def _leftovers(folder):
    return sorted(p.name for p in folder.iterdir() if p.name.endswith(".tmp"))


def test_non_finite_numbers_become_null_and_the_file_ends_with_a_newline(tmp_path):
    # JSON has no NaN or Infinity (RFC 8259, section 6): they are written as null
    path = tmp_path / "x.json"
    write_json(path, {"a": math.nan, "b": [1.5, math.inf, (np.float64(-math.inf), 2)], "c": "text"})
    text = path.read_text()
    assert text.endswith("}\n")
    assert json.loads(text) == {"a": None, "b": [1.5, None, [None, 2]], "c": "text"}
    assert finite_or_none({"k": (math.nan,)}) == {"k": [None]}


def test_a_write_that_fails_half_way_leaves_the_old_file(tmp_path):
    """json.dump streams into the file: an object that cannot be serialised fails after part of the text is
    out; the old product stays byte for byte and no temporary file is left (regression only)."""
    path = tmp_path / "forecast.json"
    write_json(path, {"amplitude": 120.0})
    old = path.read_bytes()
    with pytest.raises(TypeError, match="not JSON serializable"):
        write_json(path, {"rows": list(range(20000)), "z": object()})
    assert path.read_bytes() == old
    assert _leftovers(tmp_path) == []


def test_an_interrupt_inside_the_block_removes_the_temporary_file(tmp_path):
    path = tmp_path / "summary.json"
    write_text(path, "old\n")
    with pytest.raises(KeyboardInterrupt):
        with atomic_output(path) as tmp:
            tmp.write_text("new, half")
            assert tmp.parent == tmp_path and tmp.name.startswith(".summary.json.")
            raise KeyboardInterrupt
    assert path.read_text() == "old\n" and _leftovers(tmp_path) == []


def test_a_replaced_file_has_the_mode_of_a_freshly_created_one(tmp_path):
    # the temporary file is created like any other (umask applies), not with mkstemp's 0600
    plain = tmp_path / "plain.txt"
    plain.write_text("x")
    path = tmp_path / "config.json"
    write_json(path, {})
    assert stat.S_IMODE(os.stat(path).st_mode) == stat.S_IMODE(os.stat(plain).st_mode)
