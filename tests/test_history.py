"""Tests of pipeline.history: the append-only forecast history."""

import json

import pytest

from pipeline.history import HISTORY_KEYS, append_history, history_entry, read_history

FORECAST = {"precursor": 1.1, "precursor_error": None, "amplitude": 140.0, "interval_68": [120.0, 160.0],
            "interval_95": [100.0, 180.0], "method": "ols", "n_cycles": 8, "r": 0.9, "loo_rmse": 20.0}


def test_entries_append_and_earlier_bytes_never_change(tmp_path):
    # append-only contract (common practice, no source): each entry is one JSON line; what was
    # written before is byte-for-byte unchanged after every later append
    path = tmp_path / "history.jsonl"
    append_history(path, history_entry(FORECAST, "2034-01-31", written_utc="2034-02-01T00:00:00Z"))
    first = path.read_bytes()
    append_history(path, history_entry(dict(FORECAST, amplitude=150.0), "2034-02-28"))
    second = path.read_bytes()
    assert second.startswith(first) and len(second) > len(first)
    append_history(path, history_entry(dict(FORECAST, amplitude=155.0), "2034-03-31"))
    assert path.read_bytes().startswith(second)
    entries, problems = read_history(path)
    assert problems == [] and [e["amplitude"] for e in entries] == [140.0, 150.0, 155.0]
    assert list(entries[0]) == list(HISTORY_KEYS) and entries[0]["data_date"] == "2034-01-31"
    assert json.loads(first.decode())["written_utc"] == "2034-02-01T00:00:00Z"


def test_truncated_last_line_is_kept_and_the_new_entry_starts_a_line(tmp_path):
    path = tmp_path / "history.jsonl"
    path.write_bytes(b'{"data_date": "2034-01-31"}\n{"data_da')
    before = path.read_bytes()
    append_history(path, history_entry(FORECAST, "2034-02-28"))
    assert path.read_bytes().startswith(before)
    entries, problems = read_history(path)
    assert len(entries) == 2 and entries[1]["data_date"] == "2034-02-28"
    assert len(problems) == 1 and problems[0].startswith("line 2: not a JSON object")


def test_error_paths(tmp_path):
    with pytest.raises(ValueError, match="data_date: got 'soon'; expected an ISO date"):
        history_entry(FORECAST, "soon")
    with pytest.raises(ValueError, match="cannot append"):
        append_history(tmp_path / "no" / "such" / "dir.jsonl", history_entry(FORECAST, "2034-01-01"))
    assert read_history(tmp_path / "absent.jsonl") == ([], [])


def test_an_append_waits_for_another_writer_holding_the_file(tmp_path):
    """append_history takes an exclusive flock on the file (waiting, not failing): while another writer holds
    it, nothing is written; once it lets go the entry goes in whole (flock(2); regression only)."""
    import fcntl
    import threading

    path = tmp_path / "history.jsonl"
    append_history(path, history_entry(FORECAST, "2034-01-31"))
    before = path.read_bytes()
    with open(path, "ab") as other:
        fcntl.flock(other.fileno(), fcntl.LOCK_EX)
        writer = threading.Thread(target=append_history, args=(path, history_entry(FORECAST, "2034-02-28")))
        writer.start()
        writer.join(1.0)
        assert writer.is_alive() and path.read_bytes() == before   # still waiting for the lock
        other.write(b'{"data_date": "2034-02-01"}\n')                # the other writer's whole line
    writer.join(30)
    entries, problems = read_history(path)
    assert problems == [] and [e["data_date"] for e in entries] == ["2034-01-31", "2034-02-01", "2034-02-28"]


def test_entries_record_the_state_and_the_calibration_file(tmp_path):
    """Issue 10: an entry copies the forecast's phase, lag, minimum and status, reversal, target cycle and
    as-of date, and names the calibration file by its BLAKE2b-256 digest (hashlib, RFC 7693) and the scale
    its rows of that phase declare (the other phase's rows declare another; regression only)."""
    import hashlib

    cal = tmp_path / "calibration.csv"
    rows = ["cycle,precursor,amplitude,phase,scale"]
    rows += [f"{k},{1 + 0.1 * k},{100 + 5 * k},minimum,kvm cap60" for k in range(5)]
    rows += [f"{k},{1 + 0.1 * k},{100 + 5 * k},reversal+4,kvm cap60 lag" for k in range(5)]
    cal.write_text("\n".join(rows) + "\n")
    state = {"phase": "reversal+4", "lag_years": 4.0, "minimum_time": 2056.6, "minimum_status": "pending",
             "reversal_time": 2047.6, "target_cycle": 33, "as_of": "2053-01-01", "scale": "kvm cap60 lag"}
    entry = history_entry(dict(FORECAST, **state), "2052-12-04", calibration=str(cal), precursor_source="store")
    for key, value in state.items():
        assert entry[key] == value, key
    assert entry["calibration_digest"] == hashlib.blake2b(cal.read_bytes(), digest_size=32).hexdigest()
    assert entry["calibration_scale"] == "kvm cap60 lag"
    at_minimum = history_entry(dict(FORECAST, phase="minimum"), "2057-01-01", calibration=str(cal))
    assert at_minimum["calibration_scale"] == "kvm cap60" and at_minimum["target_cycle"] is None
    # a file that is gone: the identity is unknown, not invented
    gone = history_entry(FORECAST, "2057-01-01", calibration=str(tmp_path / "moved.csv"))
    assert gone["calibration_digest"] is None and gone["calibration_scale"] is None
    # given explicitly, nothing is read
    given = history_entry(FORECAST, "2057-01-01", calibration="elsewhere.csv", calibration_digest="ab",
                          calibration_scale=None)
    assert given["calibration_digest"] == "ab" and list(given) == list(HISTORY_KEYS)
