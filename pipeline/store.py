"""The ledger of processed files: one embedded SQLite file, crash-safe, content-addressed.

Every file an ingest sees is identified by the digest of its bytes
(BLAKE2b-256), so a renamed file is recognised and a changed file is
measured again.  Per content the store keeps the path, size, mtime, status,
skip reason, the full :class:`~pipeline.measure.FrameRecord` (JSON), the
polecast version, the measurement-code version
(:data:`pipeline.measure.MEASUREMENT_VERSION`) and the measure configuration
that produced it.  A second
table maps every path seen to its size, mtime and digest, so a re-run hashes
only files whose ``(size, mtime)`` changed.

Layout (SQLite, WAL journal; written only by the ingest driver, in
transactions, so a SIGKILL at any moment loses nothing committed and leaves
nothing half-written)::

    meta(key, value)                      schema version, digest algorithm, created
    configs(config_id, settings)          measure settings (JSON) by their digest
    files(digest, path, size, mtime_ns, status, reason, time, record,
          version, config_id, measured_utc, measure_version)
    paths(path, size, mtime_ns, digest, seen_utc)

Schema version 2 added ``files.measure_version``.  A store of schema 1 is
upgraded when it is opened for writing: the column is added with NULL
("unknown") in every existing record, so those records count as made by
another measurement-code version and must be measured again (``polecast
ingest --remeasure``).  A schema-1 store opened read-only is read as is, its
records' version unknown.

A *current* record is one whose content is still referenced by at least one
path in ``paths`` (a changed file's old content is kept in the ledger but is
no longer current).  Exports and :meth:`Store.iter_records` give current
records only, one per content, named by the first (sorted) path holding it.

*The settings of the records*: every current record was measured under one
measure configuration (its ``config_id``) by one measurement-code version.
Commands that read a store use only records measured under the settings in
force: :func:`check_measure_settings` refuses (:class:`StoreSettingsError`)
when any current record was measured otherwise, and
``iter_records(measure=...)`` yields only the records of those settings.

Writers take an exclusive ``flock`` on ``STORE.lock`` for their lifetime;
the kernel drops it when the process dies (even by SIGKILL), so a stale lock
never blocks.  Readers take no lock (WAL lets them read while a writer runs).
"""

from __future__ import annotations

import dataclasses
import datetime as _dt
import hashlib
import json
import math
import os
import sqlite3
from collections import Counter
from dataclasses import dataclass
from pathlib import Path
from typing import Iterable, Iterator

import numpy as np

from pipeline import __version__
from pipeline.locking import release_lock
from pipeline.config import ConfigError, MeasureSettings, settings_from_mapping
from pipeline.measure import JSON_KEYS, MEASUREMENT_VERSION, FrameRecord

__all__ = [
    "SCHEMA_VERSION", "DIGEST_NAME", "EXTRA_COLUMNS", "StoreError", "StoreLockedError", "StoreSettingsError",
    "MeasuredFile", "Store", "open_store", "file_digest", "config_id_of", "reason_group", "records_settings",
    "check_measure_settings", "settings_mismatch_message", "export_csv", "export_netcdf", "records_dataset",
]

SCHEMA_VERSION = 2
_READABLE_SCHEMAS = (1, 2)
DIGEST_NAME = "blake2b-256"
_DIGEST_BYTES = 32
_MODES = ("r", "a")

#: Columns of an export after :data:`pipeline.measure.JSON_KEYS`, in order.
EXTRA_COLUMNS = (
    "distance_m", "hgln_deg", "crln_deg", "rsun_m", "carrington_rotation", "observer_source", "instrument",
    "cap_latitude_deg", "mu_min", "notes", "digest", "size_bytes", "polecast_version", "config_id",
    "measured_utc", "measurement_version",
)

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta(key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS configs(config_id TEXT PRIMARY KEY, settings TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS files(
    digest TEXT PRIMARY KEY,
    path TEXT NOT NULL,
    size INTEGER NOT NULL,
    mtime_ns INTEGER NOT NULL,
    status TEXT NOT NULL,
    reason TEXT,
    time TEXT,
    record TEXT NOT NULL,
    version TEXT NOT NULL,
    config_id TEXT NOT NULL,
    measured_utc TEXT NOT NULL,
    measure_version INTEGER
);
CREATE INDEX IF NOT EXISTS files_status_time ON files(status, time);
CREATE TABLE IF NOT EXISTS paths(
    path TEXT PRIMARY KEY,
    size INTEGER NOT NULL,
    mtime_ns INTEGER NOT NULL,
    digest TEXT NOT NULL,
    seen_utc TEXT NOT NULL
);
CREATE INDEX IF NOT EXISTS paths_digest ON paths(digest);
"""

#: SQL condition: the record ``f`` is current (some path still holds its content)
_CURRENT = "EXISTS (SELECT 1 FROM paths p WHERE p.digest = f.digest)"


class StoreError(RuntimeError):
    """The store cannot be opened or used; ``str(exc)`` says why and what to do."""


class StoreLockedError(StoreError):
    """Another process is writing to the store."""


class StoreSettingsError(StoreError):
    """The store's records were measured under other settings than those in force.

    ``str(exc)`` is one line naming the differing settings, the records'
    value and the value in force (``measure.cap_latitude_deg 60.0 (records)
    vs 70.0 (in force)``, or the measurement-code versions), and the fix.
    """


@dataclass(frozen=True)
class MeasuredFile:
    """What a worker returns for one file: where, its stat, its digest and its record.

    Attributes
    ----------
    path : str
    size : int
        Bytes.
    mtime_ns : int
        Modification time, nanoseconds since the epoch.
    digest : str
        Hex BLAKE2b-256 of the bytes.
    record : dict
        :meth:`FrameRecord.to_dict` of the measurement.
    measure_version : int or None
        :data:`pipeline.measure.MEASUREMENT_VERSION` of the code that
        measured it (set by the worker; None: unknown).
    """

    path: str
    size: int
    mtime_ns: int
    digest: str
    record: dict
    measure_version: int | None = MEASUREMENT_VERSION


def file_digest(path: str | os.PathLike) -> str:
    """Hex BLAKE2b-256 digest of a file's bytes, read in a stream.

    Notes
    -----
    BLAKE2b (Saarinen & Aumasson 2015, RFC 7693) with a 32-byte output, via
    :func:`hashlib.file_digest` (constant memory).
    """
    with open(path, "rb") as fh:
        return hashlib.file_digest(fh, lambda: hashlib.blake2b(digest_size=_DIGEST_BYTES)).hexdigest()  # RFC 7693


def _canonical_json(obj) -> str:
    return json.dumps(obj, sort_keys=True, separators=(",", ":"), default=_json_default)


def _json_default(value):
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, (tuple, set, frozenset)):
        return list(value)
    raise TypeError(f"cannot store {type(value).__name__} in a record")


def _settings_dict(settings) -> dict:
    return dataclasses.asdict(settings) if dataclasses.is_dataclass(settings) else dict(settings)


def config_id_of(settings) -> str:
    """Short digest naming a measure configuration (16 hex digits of BLAKE2b of its canonical JSON).

    Settings are identified by value: a whole number and the same number as a
    float (``cap_latitude_deg = 70`` or ``70.0`` in TOML) name one
    configuration, so numbers enter the digest as floats.
    """
    canon = {k: float(v) if isinstance(v, int) and not isinstance(v, bool) else v
             for k, v in _settings_dict(settings).items()}
    return hashlib.blake2b(_canonical_json(canon).encode(), digest_size=8).hexdigest()


def reason_group(reason: str | None) -> str:
    """A skip reason without its detail: the text before the first ``(`` or ``:``.

    ``"truncated file: header declares 2880 bytes, file has 100"`` ->
    ``"truncated file"``.
    """
    text = " ".join(str(reason or "unknown").split())
    for sep in ("(", ":"):
        text = text.split(sep, 1)[0]
    return text.strip() or "unknown"


def _utc_now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).strftime("%Y-%m-%dT%H:%M:%S.%fZ")


def _finite(v):
    if isinstance(v, float) and not math.isfinite(v):
        return None
    return v


class Store:
    """An open ledger; use :func:`open_store` to get one (a context manager).

    Parameters
    ----------
    path : Path
        The SQLite file.
    mode : {"r", "a"}
        Read only, or append (creates the file, takes the writer lock).
    """

    def __init__(self, path: Path, mode: str, conn: sqlite3.Connection, lock_fd: int | None):
        self.path = path
        self.mode = mode
        self._conn = conn
        self._lock_fd = lock_fd
        cols = {row[1] for row in conn.execute("PRAGMA table_info(files)")}
        # a schema-1 store read as is: its records' measurement version is unknown (NULL)
        self._mv = "f.measure_version" if "measure_version" in cols else "NULL"

    # -- life cycle -------------------------------------------------------------------------------
    def __enter__(self) -> "Store":
        return self

    def __exit__(self, *exc) -> None:
        self.close(commit=exc[0] is None)

    def close(self, commit: bool = True) -> None:
        """Commit (unless told not to), close the database and release the lock."""
        if self._conn is not None:
            try:
                if self.mode == "a":
                    if commit:
                        self._conn.commit()
                    else:
                        self._conn.rollback()
            finally:
                self._conn.close()
                self._conn = None
        if self._lock_fd is not None:
            fd, self._lock_fd = self._lock_fd, None
            release_lock(fd)

    def _need_write(self):
        if self.mode != "a":
            raise StoreError(f"store {self.path} is open read-only; open it with mode='a' to write")

    # -- writing (driver only) --------------------------------------------------------------------
    def register_config(self, settings) -> str:
        """Record a measure configuration; returns its id."""
        self._need_write()
        cid = config_id_of(settings)
        self._conn.execute("INSERT OR IGNORE INTO configs(config_id, settings) VALUES (?, ?)",
                           (cid, _canonical_json(_settings_dict(settings))))
        return cid

    def add(self, results: Iterable[MeasuredFile], config_id: str, version: str = __version__) -> int:
        """Insert or replace the records of measured files and map their paths (no commit).

        Each record is stored with its ``measure_version`` (the version of
        the code that measured it, :attr:`MeasuredFile.measure_version`).
        Only ``ok`` and ``skipped`` records are stored (an ``error`` record is
        not a result: the file is tried again next run).

        Returns the number of results written.

        Raises
        ------
        ValueError
            A record whose status is neither ``ok`` nor ``skipped``.
        """
        self._need_write()
        now = _utc_now()
        n = 0
        for r in results:
            rec = r.record
            if rec["status"] not in ("ok", "skipped"):
                raise ValueError(f"record of {r.path}: status {rec['status']!r} is not stored; only 'ok' and "
                                 f"'skipped' records are (an error is tried again next run)")
            self._conn.execute(
                "INSERT OR REPLACE INTO files(digest, path, size, mtime_ns, status, reason, time, record, version,"
                " config_id, measured_utc, measure_version) VALUES (?,?,?,?,?,?,?,?,?,?,?,?)",
                (r.digest, r.path, int(r.size), int(r.mtime_ns), rec["status"], rec.get("reason"), rec.get("time"),
                 _canonical_json(rec), version, config_id, now, r.measure_version))
            self._link(r.path, r.size, r.mtime_ns, r.digest, now)
            n += 1
        return n

    def link(self, path: str, size: int, mtime_ns: int, digest: str) -> None:
        """Map a path to already-known content (a rename, a touched file, an identical copy); no commit.

        Paths that held the same content before and no longer exist on disk
        are forgotten, so a renamed file keeps one current name.
        """
        self._need_write()
        self._link(path, size, mtime_ns, digest, _utc_now())
        for (other,) in self._conn.execute("SELECT path FROM paths WHERE digest = ? AND path != ?",
                                           (digest, path)).fetchall():
            if not os.path.lexists(other):
                self._conn.execute("DELETE FROM paths WHERE path = ?", (other,))

    def _link(self, path, size, mtime_ns, digest, now):
        self._conn.execute(
            "INSERT OR REPLACE INTO paths(path, size, mtime_ns, digest, seen_utc) VALUES (?,?,?,?,?)",
            (path, int(size), int(mtime_ns), digest, now))

    def commit(self) -> None:
        """End the current transaction (everything written so far survives a crash)."""
        self._need_write()
        self._conn.commit()

    # -- lookups ----------------------------------------------------------------------------------
    def digest_for_stat(self, path: str, size: int, mtime_ns: int) -> str | None:
        """The digest recorded for ``path`` if its size and mtime are unchanged, else None."""
        row = self._conn.execute("SELECT size, mtime_ns, digest FROM paths WHERE path = ?", (path,)).fetchone()
        if row is None or row[0] != size or row[1] != mtime_ns:
            return None
        return row[2]

    def content_state(self, digest: str) -> tuple[str, str, int | None] | None:
        """``(config_id, polecast version, measurement version)`` of this content's record; None if never measured.

        The measurement version is None when unknown (a record kept from a
        schema-1 store).
        """
        row = self._conn.execute(f"SELECT f.config_id, f.version, {self._mv} FROM files f WHERE f.digest = ?",
                                 (digest,)).fetchone()
        return None if row is None else (row[0], row[1], row[2])

    def known_digests(self) -> Iterator[str]:
        """Every content digest in the ledger (current or not)."""
        for (d,) in self._conn.execute("SELECT digest FROM files"):
            yield d

    def config_settings(self, config_id: str) -> dict | None:
        """The measure settings stored under ``config_id``."""
        row = self._conn.execute("SELECT settings FROM configs WHERE config_id = ?", (config_id,)).fetchone()
        return None if row is None else json.loads(row[0])

    def settings_groups(self) -> dict[tuple[str, int | None], int]:
        """Current records (any status) by the settings they were measured under.

        Returns
        -------
        dict
            ``(config_id, measurement version) -> count``; the version is None
            where unknown (records of a schema-1 store).
        """
        rows = self._conn.execute(
            f"SELECT f.config_id, {self._mv}, COUNT(*) FROM files f WHERE {_CURRENT} GROUP BY 1, 2").fetchall()
        return {(cid, mv): n for cid, mv, n in rows}

    # -- reading ----------------------------------------------------------------------------------
    def _where(self, status: str | None, measure: MeasureSettings | None) -> tuple[str, tuple]:
        """SQL conditions on ``files f`` for a status and the settings in force (None: any)."""
        conds, args = [], []
        if status is not None:
            conds.append("f.status = ?")
            args.append(status)
        if measure is not None:
            conds.append(f"f.config_id = ? AND {self._mv} = ?")
            args += [config_id_of(measure), MEASUREMENT_VERSION]
        return " AND ".join(conds), tuple(args)

    def _current(self, status: str | None, columns: str, measure: MeasureSettings | None = None):
        cond, args = self._where(status, measure)
        where = f"WHERE {cond}" if cond else ""
        sql = (f"SELECT {columns}, (SELECT MIN(p.path) FROM paths p WHERE p.digest = f.digest) AS cur"
               f" FROM files f {where} ORDER BY f.time, f.digest")
        for row in self._conn.execute(sql, args):
            if row[-1] is not None:
                yield row

    def iter_records(self, status: str | None = "ok",
                     measure: MeasureSettings | None = None) -> Iterator[FrameRecord]:
        """Current records in time order (ties by digest), one per content.

        Parameters
        ----------
        status : {"ok", "skipped"} or None
            Which records; None for all.
        measure : MeasureSettings, optional
            The settings in force: yield only records measured under them by
            this measurement-code version.  Check the store first with
            :func:`check_measure_settings`, which refuses a store holding
            other records; None yields every record.

        Yields
        ------
        FrameRecord
            With ``file`` set to the content's current path.
        """
        for rec_json, cur in self._current(status, "f.record", measure):
            d = json.loads(rec_json)
            d["file"] = cur
            yield FrameRecord.from_dict(d)

    def rows(self, status: str | None = "ok", measure: MeasureSettings | None = None) -> Iterator[dict]:
        """Flat export rows: :data:`~pipeline.measure.JSON_KEYS` then :data:`EXTRA_COLUMNS`.

        ``notes`` is joined with ``"; "``; ``file`` is the current path;
        ``measure`` as in :meth:`iter_records`.
        """
        cols = f"f.record, f.digest, f.size, f.version, f.config_id, f.measured_utc, {self._mv}"
        for rec_json, digest, size, version, cid, measured, mv, cur in self._current(status, cols, measure):
            d = json.loads(rec_json)
            d["file"] = cur
            row = {k: _finite(d.get(k)) for k in JSON_KEYS}
            for k in EXTRA_COLUMNS[:9]:
                row[k] = _finite(d.get(k))
            row["notes"] = "; ".join(d.get("notes") or ())
            row.update(digest=digest, size_bytes=size, polecast_version=version, config_id=cid,
                       measured_utc=measured, measurement_version=mv)
            yield row

    def count(self, status: str | None = "ok", measure: MeasureSettings | None = None) -> int:
        """Number of current records with this status (None: all); ``measure`` as in :meth:`iter_records`."""
        cond, args = self._where(status, measure)
        return self._conn.execute(f"SELECT COUNT(*) FROM files f WHERE {_CURRENT}{' AND ' + cond if cond else ''}",
                                  args).fetchone()[0]

    def summary(self) -> dict:
        """Counts and ranges of the ledger.

        Returns
        -------
        dict
            ``store``, ``schema_version``, ``digest``, ``current`` (records
            with a path), ``ok``, ``skipped``, ``skip_reasons`` (grouped by
            :func:`reason_group`), ``superseded`` (old contents of changed
            files), ``paths``, ``first_time``, ``last_time`` (ISO, ok
            records), ``configs`` (id -> count of current records),
            ``versions`` (polecast version -> count), ``measurement_versions``
            (measurement-code version or None -> count).
        """
        c = self._conn
        cur_where = _CURRENT
        ok = self.count("ok")
        skipped = self.count("skipped")
        total = c.execute("SELECT COUNT(*) FROM files").fetchone()[0]
        reasons = Counter()
        for (reason,) in c.execute(f"SELECT reason FROM files f WHERE status != 'ok' AND {cur_where}"):
            reasons[reason_group(reason)] += 1
        first, last = c.execute(f"SELECT MIN(time), MAX(time) FROM files f WHERE status = 'ok' AND {cur_where}"
                                ).fetchone()
        configs = dict(c.execute(f"SELECT config_id, COUNT(*) FROM files f WHERE {cur_where} GROUP BY config_id"))
        versions = dict(c.execute(f"SELECT version, COUNT(*) FROM files f WHERE {cur_where} GROUP BY version"))
        mversions = dict(c.execute(f"SELECT {self._mv}, COUNT(*) FROM files f WHERE {cur_where} GROUP BY 1"))
        meta = dict(c.execute("SELECT key, value FROM meta"))
        return {
            "store": str(self.path), "schema_version": int(meta.get("schema_version", SCHEMA_VERSION)),
            "digest": meta.get("digest", DIGEST_NAME), "current": ok + skipped, "ok": ok, "skipped": skipped,
            "skip_reasons": dict(reasons.most_common()), "superseded": total - ok - skipped,
            "paths": c.execute("SELECT COUNT(*) FROM paths").fetchone()[0],
            "first_time": first, "last_time": last, "configs": configs, "versions": versions,
            "measurement_versions": mversions,
        }


# -- the settings of the records ------------------------------------------------------------------
_DEFAULT_MEASURE = MeasureSettings()


def _version_text(mv) -> str:
    return "unknown" if mv is None else str(mv)


def _stored_settings(store: Store, config_id: str) -> dict:
    """The settings stored under ``config_id`` (StoreSettingsError when the store lacks them)."""
    d = store.config_settings(config_id)
    if d is None:
        raise StoreSettingsError(f"store {store.path}: the measure settings of configuration {config_id} are not "
                                 f"recorded; measure the files again into a new store")
    return d


def _show(d: dict, k: str) -> str:
    """A setting as the user wrote it, a float setting as a float (``70`` -> ``70.0``); "absent" if missing."""
    if k not in d:
        return "absent"
    v = d[k]
    if isinstance(getattr(_DEFAULT_MEASURE, k, None), float) and isinstance(v, int) and not isinstance(v, bool):
        v = float(v)
    return repr(v)


def _settings_diff(records: dict, in_force: dict) -> list[str]:
    """``measure.KEY RECORDS (records) vs IN_FORCE (in force)`` for every key whose value differs."""
    return [f"measure.{k} {_show(records, k)} (records) vs {_show(in_force, k)} (in force)"
            for k in sorted(set(records) | set(in_force)) if records.get(k, ...) != in_force.get(k, ...)]


def settings_mismatch_message(store: Store, measure: MeasureSettings, groups: dict, fix: str) -> str:
    """One line: how many records were measured under which other settings than ``measure``, and ``fix``.

    Parameters
    ----------
    store : Store
    measure : MeasureSettings
        The settings in force.
    groups : dict
        ``(config_id, measurement version) -> count`` of the other records
        (:meth:`Store.settings_groups` without the settings in force).
    fix : str
        What to do (appended after ``"; "``).
    """
    now = dataclasses.asdict(measure)
    cid_now = config_id_of(measure)
    parts = []
    for (cid, mv), n in sorted(groups.items(), key=lambda kv: (-kv[1], kv[0][0], _version_text(kv[0][1]))):
        diff = [] if cid == cid_now else (_settings_diff(_stored_settings(store, cid), now)
                                          or [f"configuration {cid} (records) vs {cid_now} (in force)"])
        if mv != MEASUREMENT_VERSION:
            diff.append(f"measurement code version {_version_text(mv)} (records) vs {MEASUREMENT_VERSION} "
                        f"(in force)" + (" (recorded before polecast kept versions)" if mv is None else ""))
        parts.append(f"{n} with {', '.join(diff)}")
    total = sum(groups.values())
    return (f"store {store.path} holds {total} record{'s' if total != 1 else ''} measured under other settings "
            f"than those in force ({'; '.join(parts)}); {fix}")


def records_settings(store: Store) -> MeasureSettings:
    """The single measure configuration of the store's current records.

    Parameters
    ----------
    store : Store

    Returns
    -------
    MeasureSettings
        The settings every current record (ok or skipped) was measured
        under; for a store without records, the defaults (it has no settings
        of its own, and an ingest without a configuration would use them).

    Raises
    ------
    StoreSettingsError
        The records were measured under several configurations or by
        several measurement-code versions (each named, with its count), or
        their settings cannot be rebuilt by this polecast (a key it does not
        know, or one it has added since).
    """
    groups = store.settings_groups()
    if not groups:
        return MeasureSettings()
    cids = sorted({cid for cid, _ in groups}, key=lambda c: -sum(n for (k, _), n in groups.items() if k == c))
    if len(groups) > 1:
        first = _stored_settings(store, cids[0])
        parts = []
        for (cid, mv), n in sorted(groups.items(), key=lambda kv: -kv[1]):
            d = _stored_settings(store, cid)
            what = ", ".join(f"measure.{k} {_show(d, k)}" for k in sorted(set(d) | set(first))
                             if d.get(k, ...) != first.get(k, ...)) if cid != cids[0] else ""
            parts.append(f"{n} with configuration {cid}{' (' + what + ')' if what else ''}, measurement code "
                         f"version {_version_text(mv)}")
        raise StoreSettingsError(
            f"store {store.path} holds records measured under several settings ({'; '.join(parts)}); measure "
            f"them all again under one configuration (`polecast ingest PATHS --store {store.path} --config FILE "
            f"--remeasure`), or give the configuration to use with --config")
    stored = _stored_settings(store, cids[0])
    try:
        settings = settings_from_mapping(MeasureSettings, "measure", stored)
    except ConfigError as exc:
        raise StoreSettingsError(f"store {store.path}: its records were measured under settings this polecast "
                                 f"cannot use ({exc}); measure them again (`polecast ingest PATHS --store "
                                 f"{store.path} --remeasure`)") from None
    if config_id_of(settings) != cids[0]:  # a key added since: its default would be a guess
        diff = _settings_diff(stored, dataclasses.asdict(settings))
        raise StoreSettingsError(f"store {store.path}: its records' settings are incomplete for this polecast "
                                 f"({', '.join(diff)}); measure them again (`polecast ingest PATHS --store "
                                 f"{store.path} --remeasure`)")
    return settings


def check_measure_settings(store: Store, measure: MeasureSettings | None) -> MeasureSettings:
    """The measure settings in force for reading ``store``; refuses records measured otherwise.

    Parameters
    ----------
    store : Store
    measure : MeasureSettings or None
        The settings of the configuration given (its ``[measure]``
        section); None when no configuration was given: the store's own
        (:func:`records_settings`) are in force.

    Returns
    -------
    MeasureSettings
        The settings in force; pass them to ``store.iter_records(measure=...)``.

    Raises
    ------
    StoreSettingsError
        A current record was measured under other settings (its
        configuration id differs) or by another measurement-code version
        than :data:`pipeline.measure.MEASUREMENT_VERSION`.  An empty store
        passes.
    """
    if measure is None:
        measure = records_settings(store)
        fix = (f"measure them again with this polecast (`polecast ingest PATHS --store {store.path} "
               f"--remeasure`)")
    else:
        fix = (f"measure them again under these settings (`polecast ingest PATHS --store {store.path} --config "
               f"FILE --remeasure`), or leave out --config to use the store's own configuration")
    want = (config_id_of(measure), MEASUREMENT_VERSION)
    other = {k: n for k, n in store.settings_groups().items() if k != want}
    if other:
        raise StoreSettingsError(settings_mismatch_message(store, measure, other, fix))
    return measure


def _take_lock(path: Path) -> int:
    from pipeline.locking import LockHeldError, take_lock

    try:
        return take_lock(path.with_name(path.name + ".lock"))
    except LockHeldError as exc:
        raise StoreLockedError(
            f"store {path} is in use by another ingest ({exc.holder}); wait for it to finish or stop it, "
            f"then run again (a dead process releases the lock by itself)") from None


def _upgrade(conn: sqlite3.Connection, version: int) -> None:
    """Bring a store of an older schema to :data:`SCHEMA_VERSION`, in one transaction."""
    with conn:
        if version < 2:  # 1 -> 2: the measurement version, unknown (NULL) for the records kept
            cols = {row[1] for row in conn.execute("PRAGMA table_info(files)")}
            if "measure_version" not in cols:
                conn.execute("ALTER TABLE files ADD COLUMN measure_version INTEGER")
        conn.execute("UPDATE meta SET value = ? WHERE key = 'schema_version'", (str(SCHEMA_VERSION),))


def open_store(path: str | os.PathLike, mode: str = "r") -> Store:
    """Open (mode ``"a"``: create if needed, and lock for writing) a store.

    Parameters
    ----------
    path : str or path-like
        The SQLite file (e.g. ``archive.polecast``).
    mode : {"r", "a"}
        ``"r"`` reads (the file must exist), ``"a"`` appends and takes the
        exclusive writer lock ``PATH.lock``.

    Returns
    -------
    Store
        Use as a context manager.

    Raises
    ------
    ValueError
        Unknown mode.
    StoreError
        Missing (mode "r") or unusable file; :class:`StoreLockedError` when
        another process is writing.
    """
    if mode not in _MODES:
        raise ValueError(f"mode: got {mode!r}; valid modes are {', '.join(map(repr, sorted(_MODES)))} "
                         f"(read, append)")
    path = Path(path)
    if mode == "r" and not path.is_file():
        raise StoreError(f"store {path}: no such file; create it with `polecast ingest PATH --store {path}`")
    if mode == "a" and not path.parent.is_dir():
        raise StoreError(f"store {path}: directory {path.parent} does not exist; create it first")
    lock_fd = _take_lock(path) if mode == "a" else None
    try:
        conn = sqlite3.connect(str(path), timeout=30.0)
        try:
            if mode == "a":
                conn.execute("PRAGMA journal_mode=WAL")
                conn.execute("PRAGMA synchronous=NORMAL")  # WAL + NORMAL: durable up to the last checkpointed
                conn.executescript(_SCHEMA)
                conn.execute("INSERT OR IGNORE INTO meta(key, value) VALUES ('schema_version', ?)",
                             (str(SCHEMA_VERSION),))
                conn.execute("INSERT OR IGNORE INTO meta(key, value) VALUES ('digest', ?)", (DIGEST_NAME,))
                conn.execute("INSERT OR IGNORE INTO meta(key, value) VALUES ('created_utc', ?)", (_utc_now(),))
                conn.commit()
            else:
                conn.execute("PRAGMA query_only=ON")
            meta = dict(conn.execute("SELECT key, value FROM meta"))
        except sqlite3.DatabaseError as exc:
            conn.close()
            raise StoreError(f"store {path}: not a polecast store ({exc})") from None
        version = int(meta.get("schema_version", 0))
        if version not in _READABLE_SCHEMAS:
            conn.close()
            raise StoreError(f"store {path}: schema version {version}, this polecast reads "
                             f"{', '.join(map(str, _READABLE_SCHEMAS))}")
        if mode == "a" and version < SCHEMA_VERSION:
            _upgrade(conn, version)
    except BaseException:
        if lock_fd is not None:
            os.close(lock_fd)
        raise
    return Store(path, mode, conn, lock_fd)


# -- export ---------------------------------------------------------------------------------------
def export_csv(store: Store, stream, status: str | None = "ok", measure: MeasureSettings | None = None) -> int:
    """Write current records as CSV (header line; ``JSON_KEYS`` then ``EXTRA_COLUMNS``); returns rows written.

    ``measure`` as in :meth:`Store.iter_records` (None: every record).
    """
    import csv

    writer = csv.DictWriter(stream, fieldnames=list(JSON_KEYS) + list(EXTRA_COLUMNS), lineterminator="\n")
    writer.writeheader()
    n = 0
    for row in store.rows(status, measure):
        writer.writerow({k: ("" if v is None else v) for k, v in row.items()})
        n += 1
    return n


#: variable -> (units, long_name) of the netCDF export; units in UDUNITS spelling
_VAR_ATTRS = {
    "b0_deg": ("degree", "heliographic latitude of the observer (B0 angle)"),
    "north_br_gauss": ("gauss", "area-weighted mean radial field of the north polar cap"),
    "south_br_gauss": ("gauss", "area-weighted mean radial field of the south polar cap"),
    "north_flux_mx": ("maxwell", "signed radial magnetic flux of the measured north polar cap"),
    "south_flux_mx": ("maxwell", "signed radial magnetic flux of the measured south polar cap"),
    "north_coverage": ("1", "measured fraction of the north polar cap area"),
    "south_coverage": ("1", "measured fraction of the south polar cap area"),
    "north_pixels": ("1", "number of pixels measured in the north polar cap"),
    "south_pixels": ("1", "number of pixels measured in the south polar cap"),
    "north_br_error_gauss": ("gauss", "standard error of the north polar cap mean radial field"),
    "south_br_error_gauss": ("gauss", "standard error of the south polar cap mean radial field"),
    "distance_m": ("m", "distance from the observer to the centre of the Sun"),
    "hgln_deg": ("degree", "Stonyhurst heliographic longitude of the observer"),
    "crln_deg": ("degree", "Carrington longitude of the observer"),
    "rsun_m": ("m", "radius of the sphere the data are projected onto"),
    "carrington_rotation": ("1", "Carrington rotation number (fractional)"),
    "cap_latitude_deg": ("degree", "polar cap boundary |latitude|"),
    "mu_min": ("1", "lowest cosine of the viewing angle used"),
    "size_bytes": ("byte", "file size"),
    "measurement_version": ("1", "version of the measurement code (-1: unknown)"),
}
_TEXT_VARS = {
    "file": "file path", "observer_source": "where the observer geometry came from (header, ephemeris, header+ephemeris or instrument default)",
    "instrument": "instrument as named by the file", "notes": "provenance remarks",
    "digest": f"{DIGEST_NAME} digest of the file's bytes (hex)", "polecast_version": "polecast version",
    "config_id": "id of the measure configuration", "measured_utc": "when the file was measured (UTC)",
}
_INT_VARS = ("north_pixels", "south_pixels", "size_bytes", "measurement_version")


def records_dataset(store: Store, measure: MeasureSettings | None = None):
    """Current ok records as an :class:`xarray.Dataset` on a ``time`` dimension.

    ``measure`` as in :meth:`Store.iter_records` (None: every record).

    Numeric columns become float64 variables (int64 for pixel counts and
    sizes) with ``units`` and ``long_name`` attributes; text columns become
    string variables; the latitude profile becomes ``profile_br_gauss`` and
    ``profile_area_m2`` on ``(time, latitude)`` with CF cell bounds
    ``latitude_bnds`` when every record shares the same bin edges.

    Notes
    -----
    Attributes follow the CF conventions 1.10 (Eaton et al. 2022, NetCDF
    Climate and Forecast Metadata Conventions): ``units`` in UDUNITS
    spelling, ``long_name``, ``standard_name``/``axis`` on the time
    coordinate and ``bounds`` on the latitude coordinate (section 7.1).
    Arrays are preallocated from the row count, so memory is the size of the
    result only.
    """
    import xarray as xr

    from pipeline.timeutil import to_datetime64

    n = store.count("ok", measure)
    numeric = [k for k in list(JSON_KEYS) + list(EXTRA_COLUMNS) if k in _VAR_ATTRS]
    arrays = {k: (np.zeros(n, np.int64) if k in _INT_VARS else np.full(n, np.nan)) for k in numeric}
    texts = {k: np.empty(n, dtype=object) for k in _TEXT_VARS}
    times = np.empty(n, dtype="datetime64[ns]")
    edges = None
    prof_br = prof_area = None
    profile_ok = True
    i = 0
    cols = f"f.record, f.digest, f.size, f.version, f.config_id, f.measured_utc, {store._mv}"
    for rec_json, digest, size, version, cid, measured, mv, cur in store._current("ok", cols, measure):
        if i >= n:  # pragma: no cover - a writer added rows meanwhile; keep the counted ones
            break
        d = json.loads(rec_json)
        d.update(file=cur, digest=digest, size_bytes=size, polecast_version=version, config_id=cid,
                 measured_utc=measured, notes="; ".join(d.get("notes") or ()),
                 measurement_version=-1 if mv is None else mv)
        times[i] = to_datetime64(d["time"])
        for k in numeric:
            v = d.get(k)
            if v is not None:
                arrays[k][i] = v
        for k in texts:
            texts[k][i] = "" if d.get(k) is None else str(d[k])
        e = d.get("profile_edges_deg") or []
        if edges is None and profile_ok:
            edges = np.asarray(e, dtype=np.float64)
            prof_br = np.full((n, max(edges.size - 1, 0)), np.nan, dtype=np.float64)
            prof_area = np.zeros_like(prof_br)
        if profile_ok and (len(e) != edges.size or not np.allclose(e, edges)):
            profile_ok = False
        if profile_ok and edges.size > 1:
            prof_br[i] = [np.nan if v is None else v for v in d["profile_br_gauss"]]
            prof_area[i] = d["profile_area_m2"]
        i += 1
    time_attrs = {"standard_name": "time", "long_name": "observation time (UTC)", "axis": "T"}
    data_vars = {}
    for k in numeric:
        units, long_name = _VAR_ATTRS[k]
        data_vars[k] = ("time", arrays[k][:i], {"units": units, "long_name": long_name})
    for k, long_name in _TEXT_VARS.items():
        data_vars[k] = ("time", texts[k][:i].astype(str), {"long_name": long_name})
    coords = {"time": ("time", times[:i], time_attrs)}
    if profile_ok and edges is not None and edges.size > 1:
        centres = 0.5 * (edges[:-1] + edges[1:])
        coords["latitude"] = ("latitude", centres, {"units": "degree", "axis": "Y", "bounds": "latitude_bnds",
                                                    "long_name": "heliographic (Stonyhurst) latitude, bin centre"})
        data_vars["latitude_bnds"] = (("latitude", "nv"), np.stack([edges[:-1], edges[1:]], axis=1),
                                      {"units": "degree", "long_name": "latitude bin edges"})
        data_vars["profile_br_gauss"] = (("time", "latitude"), prof_br[:i],
                                         {"units": "gauss", "long_name": "area-weighted mean radial field per "
                                                                         "latitude bin"})
        data_vars["profile_area_m2"] = (("time", "latitude"), prof_area[:i],
                                        {"units": "m2", "long_name": "measured area per latitude bin"})
    ds = xr.Dataset(data_vars, coords=coords)
    ds.attrs.update({
        "Conventions": "CF-1.10", "title": "polar-cap measurements of full-disk magnetograms",
        "source": f"polecast {__version__}", "store": str(store.path),
        "history": f"{_utc_now()} exported by polecast {__version__} from {store.path}",
        "comment": "one entry per measured file (status ok); skipped files are not included",
    })
    return ds


def _netcdf_engine() -> str:
    """The first usable xarray netCDF-4 writer: netCDF4, else h5netcdf (which needs h5py)."""
    import importlib.util

    if importlib.util.find_spec("netCDF4") is not None:
        return "netcdf4"
    if importlib.util.find_spec("h5netcdf") is not None and importlib.util.find_spec("h5py") is not None:
        return "h5netcdf"
    raise StoreError("netCDF export needs the netCDF4 package or h5netcdf with h5py; install one "
                     "(pip install netCDF4), or export with --format csv")


def export_netcdf(store: Store, out: str | os.PathLike, engine: str | None = None,
                  measure: MeasureSettings | None = None) -> int:
    """Write :func:`records_dataset` to a netCDF-4 file; returns the number of frames.

    ``engine`` is an xarray netCDF engine; None picks netCDF4, else h5netcdf;
    ``measure`` as in :meth:`Store.iter_records`.
    """
    engine = engine or _netcdf_engine()
    ds = records_dataset(store, measure)
    encoding = {"time": {"units": "milliseconds since 1970-01-01 00:00:00", "calendar": "proleptic_gregorian",
                         "dtype": "float64"}}
    ds.to_netcdf(out, engine=engine, encoding=encoding)
    return int(ds.sizes["time"])
