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
