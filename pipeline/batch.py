"""Archive ingest: scan, hash, measure in parallel (local processes or dask.distributed), record.

The driver process walks the archive lazily and keeps only a bounded window
of work in flight, so its memory does not grow with the archive.  For each
file it first asks the store whether ``(path, size, mtime)`` is already
known (no hashing at all for unchanged files).  Files with an unknown stat
are hashed by the workers (BLAKE2b-256 of the bytes, streamed); a digest
already in the store is only linked to the new path (a rename or a touched
file is not measured again); unknown content is measured by the workers with
:func:`pipeline.measure.measure_file`.  Results are committed in
transactions every ``commit_every_files`` results or ``commit_every_s``
seconds, whichever comes first; only the driver writes the store.

Two back-ends run the same worker functions: a local
:class:`concurrent.futures.ProcessPoolExecutor` (``workers`` processes,
forkserver start, so no worker inherits the store's lock) or an existing
dask.distributed cluster (``scheduler="tcp://HOST:PORT"``).
"""

from __future__ import annotations

import concurrent.futures as cf
import fnmatch
import glob
import os
import sys
import time
from collections import Counter, deque
from dataclasses import dataclass, field
from typing import Callable, Iterable, Iterator

from pipeline.config import ConfigError, MeasureSettings, check_number
from pipeline.measure import MEASUREMENT_VERSION
from pipeline.store import MeasuredFile, Store, config_id_of, file_digest, reason_group, settings_mismatch_message

__all__ = ["IngestSettings", "IngestError", "IngestSummary", "DEFAULT_PATTERNS", "CHANGED_WHILE_READ", "scan_paths",
           "hash_files",
           "measure_files", "ingest"]

#: File-name patterns taken from directories when none is given: FITS in its usual spellings,
#: plain or compressed (``*.fits*`` covers ``.fits``, ``.fits.gz``, ``.fits.fz``).
DEFAULT_PATTERNS = ("*.fits*", "*.fts", "*.fit")


_MAX_CRASHES_WITHOUT_PROGRESS = 5


class IngestError(RuntimeError):
    """The ingest cannot start or go on (bad path, unreachable scheduler, configuration mismatch)."""


@dataclass(frozen=True)
class IngestSettings:
    """How an archive is ingested (section ``[ingest]``).

    Attributes
    ----------
    workers : int
        Local worker processes; 0 means one per CPU core (``os.cpu_count()``).
    patterns : tuple of str
        Shell patterns a file name found in a directory must match
        (:data:`DEFAULT_PATTERNS`); files named on the command line are
        always taken.
    measure_chunk_files : int
        Files measured per task.
    hash_chunk_files : int
        Files hashed per task.
    in_flight_per_worker : int
        Tasks queued per worker (the sliding window).
    commit_every_files : int
        Commit after this many results...
    commit_every_s : float
        ...or this many seconds, whichever comes first (seconds).
    connect_timeout_s : float
        How long to try reaching a dask scheduler (seconds).
    """

    workers: int = 0
    patterns: tuple = DEFAULT_PATTERNS
    measure_chunk_files: int = 4
    hash_chunk_files: int = 64
    in_flight_per_worker: int = 4
    commit_every_files: int = 500
    commit_every_s: float = 2.0
    connect_timeout_s: float = 10.0

    def __post_init__(self):
        check_number("ingest.workers", self.workers, lo=0, hi=4096, integer=True)
        check_number("ingest.measure_chunk_files", self.measure_chunk_files, lo=1, hi=10000, integer=True)
        check_number("ingest.hash_chunk_files", self.hash_chunk_files, lo=1, hi=100000, integer=True)
        check_number("ingest.in_flight_per_worker", self.in_flight_per_worker, lo=1, hi=1000, integer=True)
        check_number("ingest.commit_every_files", self.commit_every_files, lo=1, integer=True)
        check_number("ingest.commit_every_s", self.commit_every_s, lo=0.0, lo_open=True)
        check_number("ingest.connect_timeout_s", self.connect_timeout_s, lo=0.0, lo_open=True)
        pats = (self.patterns,) if isinstance(self.patterns, str) else self.patterns
        if (not isinstance(pats, (list, tuple)) or not pats
                or not all(isinstance(p, str) and p.strip() for p in pats)):
            raise ConfigError(f"ingest.patterns: got {self.patterns!r}; expected a non-empty list of shell "
                              f"patterns such as {list(DEFAULT_PATTERNS)!r}")
        object.__setattr__(self, "patterns", tuple(pats))

    @property
    def worker_count(self) -> int:
        """``workers``, with 0 resolved to the number of cores."""
        return self.workers or (os.cpu_count() or 1)



def _by_count(counts: Counter) -> list:
    """``(reason, n)`` most frequent first, ties in alphabetical order (stable whatever the completion order)."""
    return sorted(counts.items(), key=lambda kv: (-kv[1], kv[0]))

@dataclass
class IngestSummary:
    """What one ingest did.

    Attributes
    ----------
    new_ok, new_skipped : int
        Newly measured contents, by outcome (re-measured ones included).
    remeasured : int
        Of those, contents measured before under other settings (another
        configuration or measurement-code version).
    known : int
        Paths whose content was already in the store (unchanged, renamed,
        touched or identical copies).
    hashed : int
        Files whose bytes were hashed (their stat was new or changed).
    unreadable : int
        Files not stored because they could not be read whole and
        unchanged: an operating-system error, or the file changed while it
        was read (tried again next run).
    errors : int
        Files not stored because measuring them failed for a reason outside
        the file: an unexpected exception in the measurement code (a bug),
        out of memory, or a worker process that died on it (tried again
        next run; never a permanent skip).
    skip_reasons : Counter
        Grouped reasons (:func:`pipeline.store.reason_group`) of the new
        skipped files (bad input: permanent, stored).
    unreadable_reasons : Counter
        Grouped reasons of the unreadable files.
    error_reasons : Counter
        Grouped reasons of the errors.
    stale_config : int
        Current records of other settings left as they were (not under the
        scanned paths).
    elapsed_s : float
        Wall time (seconds).
    """

    new_ok: int = 0
    new_skipped: int = 0
    remeasured: int = 0
    known: int = 0
    hashed: int = 0
    unreadable: int = 0
    errors: int = 0
    skip_reasons: Counter = field(default_factory=Counter)
    unreadable_reasons: Counter = field(default_factory=Counter)
    error_reasons: Counter = field(default_factory=Counter)
    stale_config: int = 0
    elapsed_s: float = 0.0

    @property
    def new(self) -> int:
        return self.new_ok + self.new_skipped

    @property
    def exit_code(self) -> int:
        """0 when every file was measured or already known; 1 when any was skipped, unreadable or an error."""
        return 1 if (self.new_skipped or self.unreadable or self.errors) else 0

    def line(self) -> str:
        """``ingest: 1200 new (1180 ok, 20 skipped: 12 truncated file, 8 ...), 3400 already known[, ...]``.

        Then, when there are any: ``N re-measured ...``, ``N not stored
        (reasons; tried again next run)`` for unreadable files and ``N
        errors (reasons; not stored, tried again next run)``.
        """
        inner = f"{self.new_ok} ok, {self.new_skipped} skipped"
        if self.new_skipped:
            inner += ": " + ", ".join(f"{n} {r}" for r, n in _by_count(self.skip_reasons))
        text = f"ingest: {self.new} new ({inner}), {self.known} already known"
        if self.remeasured:
            text += f", {self.remeasured} re-measured under the settings in force"
        if self.unreadable:
            why = ", ".join(f"{n} {r}" for r, n in _by_count(self.unreadable_reasons))
            text += f", {self.unreadable} not stored ({why}; tried again next run)"
        if self.errors:
            why = ", ".join(f"{n} {r}" for r, n in _by_count(self.error_reasons))
            text += f", {self.errors} error{'s' if self.errors != 1 else ''} ({why}; not stored, tried again next run)"
        if self.stale_config:
            text += f", {self.stale_config} records of other settings not found under the given paths"
        return text


# -- scanning -------------------------------------------------------------------------------------
def _walk(top: str, patterns) -> Iterator[str]:
    """Files under ``top`` whose names match a pattern, depth first, in sorted order."""
    try:
        with os.scandir(top) as it:
            entries = sorted(it, key=lambda e: e.name)
    except OSError as exc:
        print(f"polecast ingest: cannot list {top}: {exc.strerror or exc}", file=sys.stderr)
        return
    for e in entries:
        try:
            if e.is_dir():
                yield from _walk(e.path, patterns)
            elif e.is_file() and any(fnmatch.fnmatchcase(e.name, p) for p in patterns):
                yield e.path
        except OSError:
            continue


def scan_paths(paths: Iterable[str | os.PathLike], patterns=DEFAULT_PATTERNS) -> Iterator[str]:
    """Absolute paths of the files to ingest, lazily (memory flat in archive size).

    Parameters
    ----------
    paths : iterable of str or path-like
        Directories (walked recursively, names filtered by ``patterns``),
        files (always taken) or glob patterns (``**`` allowed; matching files
        are taken, matching directories are walked).
    patterns : sequence of str
        Shell patterns for names found in directories.

    Raises
    ------
    IngestError
        A path that does not exist and is not a glob pattern (checked before
        anything is yielded).
    """
    paths = [os.fspath(p) for p in paths]
    for p in paths:
        if not glob.has_magic(p) and not os.path.exists(p):
            raise IngestError(f"path {p!r}: no such file or directory; give existing directories, files or "
                              f"glob patterns")
    return _scan(paths, tuple(patterns))


def _scan(paths, patterns):
    for p in paths:
        targets = sorted(glob.iglob(p, recursive=True)) if glob.has_magic(p) else [p]
        if not targets:
            print(f"polecast ingest: pattern {p!r} matched nothing", file=sys.stderr)
        for t in targets:
            if os.path.isdir(t):
                yield from _walk(os.path.abspath(t), patterns)
            elif os.path.isfile(t):
                yield os.path.abspath(t)


# -- worker functions (module level so that they pickle) ------------------------------------------
#: Reason of a file whose size or modification time changed while it was hashed or measured.
CHANGED_WHILE_READ = "file changed while it was read"


def hash_files(paths: list[str]) -> list[tuple]:
    """``(path, size, mtime_ns, digest or None, error or None)`` for each path (runs in a worker)."""
    out = []
    for p in paths:
        try:
            st = os.stat(p)
            digest = file_digest(p)
            st2 = os.stat(p)
            if (st2.st_size, st2.st_mtime_ns) != (st.st_size, st.st_mtime_ns):
                out.append((p, st2.st_size, st2.st_mtime_ns, None, CHANGED_WHILE_READ))
                continue
            out.append((p, st.st_size, st.st_mtime_ns, digest, None))
        except OSError as exc:
            out.append((p, 0, 0, None, f"cannot read file: {exc.strerror or exc}"))
    return out


def _stat_key(path: str) -> tuple[int, int]:
    st = os.stat(path)
    return st.st_size, st.st_mtime_ns


def _unreadable(path: str, reason: str) -> dict:
    """A record of a file that could not be read whole and unchanged: never stored, tried again next run."""
    return {"file": path, "status": "unreadable", "reason": reason}


def measure_files(items: list[tuple], settings: MeasureSettings) -> list[MeasuredFile]:
    """Measure ``(path, size, mtime_ns, digest)`` items (runs in a worker).

    Each result's ``record`` has status ``ok`` or ``skipped`` (a result,
    stored), ``error`` (:func:`pipeline.measure.error_record`: the
    measurement failed for a reason outside the file) or ``unreadable`` (an
    operating-system error, or the file changed while it was read); the last
    two are never stored, so the next run tries the file again.

    Notes
    -----
    The file's ``(size, mtime_ns)`` is taken before and after measuring.
    When they differ, the bytes measured are not one version of the file:
    the reason is :data:`CHANGED_WHILE_READ`.  When they agree with each
    other but not with the hashed ones (the file was replaced between
    hashing and measuring), the file is hashed again, and checked again,
    so the digest names the bytes that were measured.  A rewrite that keeps
    the size and falls within the file system's mtime resolution cannot be
    seen this way.
    """
    from pipeline.measure import MEASUREMENT_VERSION, measure_file

    out = []
    for path, size, mtime_ns, digest in items:
        try:
            before = _stat_key(path)
            rec = measure_file(path, settings).to_dict()
            if _stat_key(path) != before:
                rec = _unreadable(path, CHANGED_WHILE_READ)
            elif before != (size, mtime_ns):  # replaced after hashing: name the bytes that were measured
                digest = file_digest(path)
                if _stat_key(path) != before:
                    rec = _unreadable(path, CHANGED_WHILE_READ)
                size, mtime_ns = before
        except OSError as exc:
            rec = _unreadable(path, f"cannot read file: {exc.strerror or exc}")
        out.append(MeasuredFile(path, size, mtime_ns, digest, rec, MEASUREMENT_VERSION))
    return out


def _warm_up() -> None:
    """Import the reading stack once per worker process."""
    import pipeline.measure  # noqa: F401
    import pipeline.reader  # noqa: F401
    try:
        import sunpy.map  # noqa: F401
    except ImportError:  # pragma: no cover - a worker without sunpy reports it per file
        pass


# -- back-ends ------------------------------------------------------------------------------------
class _LocalBackend:
    def __init__(self, workers: int):
        import multiprocessing as mp

        ctx = mp.get_context("forkserver")  # a fresh server process: workers share no fd with the driver
        ctx.set_forkserver_preload(["pipeline.batch", "pipeline.measure", "astropy.io.fits", "astropy.time",
                                    "sunpy.map", "sunpy.coordinates"])
        self.workers = workers
        self._ctx = ctx
        self._pool = None

    def submit(self, fn, *args):
        if self._pool is None:
            self._pool = cf.ProcessPoolExecutor(max_workers=self.workers, mp_context=self._ctx,
                                                initializer=_warm_up)
        return self._pool.submit(fn, *args)

    def wait_some(self, futures):
        return cf.wait(futures, return_when=cf.FIRST_COMPLETED)[0]

    def restart(self):
        if not getattr(self._pool, "_broken", False):
            return  # already replaced after this crash
        self._pool.shutdown(wait=False, cancel_futures=True)
        self._pool = cf.ProcessPoolExecutor(max_workers=self.workers, mp_context=self._ctx, initializer=_warm_up)

    def close(self):
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)


class _DaskBackend:
    def __init__(self, address: str, timeout_s: float):
        import logging

        from distributed import Client

        if "://" not in address:
            raise IngestError(f"--scheduler: got {address!r}; expected an address such as tcp://HOST:8786")
        quiet = [logging.getLogger(n) for n in ("distributed", "distributed.client", "distributed.comm")]
        levels = [lg.level for lg in quiet]
        for lg in quiet:
            lg.setLevel(logging.CRITICAL)
        try:
            self._client = Client(address, timeout=f"{timeout_s}s", set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            msg = " ".join(str(exc).split()) or type(exc).__name__
            raise IngestError(f"cannot reach the dask scheduler at {address} within {timeout_s:g} s ({msg}); "
                              f"start it with `dask scheduler` and `dask worker {address}`, or leave out "
                              f"--scheduler to run locally") from None
        finally:
            for lg, lv in zip(quiet, levels):
                lg.setLevel(lv)
        from distributed import as_completed

        self._done = as_completed(loop=self._client.loop)  # the sliding window's completion queue
        info = self._client.scheduler_info()
        # window sized on the threads present now (at least 2, so a cluster still starting gets work)
        self.workers = max(2, sum(w.get("nthreads", 1) for w in info.get("workers", {}).values()))

    def submit(self, fn, *args):
        fut = self._client.submit(fn, *args, pure=False)
        self._done.add(fut)
        return fut

    def wait_some(self, futures):
        first = next(self._done)  # blocks until one of the submitted futures is done
        return {first, *self._done.next_batch(block=False)}

    def restart(self):  # the scheduler reschedules work of lost workers itself
        pass

    def close(self):
        self._client.close()


# -- progress -------------------------------------------------------------------------------------
class _Progress:
    """``\\r 1234/5000 files  36.2 files/s  0:01:44 left`` on a terminal, at most 5 times a second."""

    def __init__(self, total: int, stream):
        self.total, self.stream = total, stream
        self.t0 = time.monotonic()
        self.last = 0.0

    def update(self, done: int, measured: int, force: bool = False) -> None:
        now = time.monotonic()
        if not force and now - self.last < 0.2:
            return
        self.last = now
        dt = max(now - self.t0, 1e-9)
        rate = done / dt
        left = (self.total - done) / rate if rate > 0 else float("inf")
        eta = "--:--:--" if left == float("inf") else time.strftime("%H:%M:%S", time.gmtime(left))
        width = 24
        filled = int(width * done / self.total) if self.total else width
        bar = "#" * filled + "-" * (width - filled)
        self.stream.write(f"\r[{bar}] {done}/{self.total} files, {measured} measured, {rate:.1f} files/s, "
                          f"{eta} left ")
        self.stream.flush()

    def close(self) -> None:
        self.stream.write("\r\033[K")
        self.stream.flush()


# -- the driver -----------------------------------------------------------------------------------
def _foreign_records(store: Store, config_id: str) -> dict:
    """Current records not measured under ``config_id`` by this measurement code: (config, version) -> count."""
    return {k: n for k, n in store.settings_groups().items() if k != (config_id, MEASUREMENT_VERSION)}


def _chunks(it: Iterator, size: int) -> Iterator[list]:
    buf = []
    for x in it:
        buf.append(x)
        if len(buf) >= size:
            yield buf
            buf = []
    if buf:
        yield buf


def ingest(paths: Iterable[str | os.PathLike], store: Store, measure: MeasureSettings | None = None,
           settings: IngestSettings | None = None, *, scheduler: str | None = None, remeasure: bool = False,
           progress: bool = False, progress_stream=None,
           on_skip: Callable[[str, str], None] | None = None,
           on_error: Callable[[str, str], None] | None = None) -> IngestSummary:
    """Measure every file under ``paths`` that the store does not hold yet, and record it.

    Parameters
    ----------
    paths : iterable of str or path-like
        Directories, files or glob patterns (:func:`scan_paths`).
    store : Store
        Opened with mode ``"a"``.
    measure : MeasureSettings, optional
    settings : IngestSettings, optional
    scheduler : str, optional
        ``tcp://HOST:PORT`` of a dask.distributed scheduler; None runs
        ``settings.worker_count`` local processes.
    remeasure : bool
        Measure again files whose record was made under other settings
        (another measure configuration or measurement-code version,
        :data:`pipeline.measure.MEASUREMENT_VERSION`); without it such
        records make the ingest refuse
        (:class:`IngestError`).
    progress : bool
        Draw a progress bar on ``progress_stream`` (default stdout).
    on_skip : callable, optional
        Called ``on_skip(path, reason)`` for each new skipped file (bad
        input, stored), and for each file not stored when ``on_error`` is
        None.
    on_error : callable, optional
        Called ``on_error(path, reason)`` for each file not stored this run
        (unreadable, or an error: see :class:`IngestSummary`); tried again
        next run.

    Notes
    -----
    Worker failures: a task that raises is split into one task per file,
    and a file whose own task raises is an error.  When a local worker
    process dies (the pool breaks), every task that was in flight is a
    suspect: its files are run again one at a time, with nothing else in
    flight, so a file whose worker dies while it runs alone is the culprit
    (an error, not stored, tried again next run) and every other file is
    measured and stored as usual.  More than five culprits in a row without
    a file measured in between stop the ingest (:class:`IngestError`),
    keeping everything committed.

    Returns
    -------
    IngestSummary

    Raises
    ------
    IngestError
        Missing path, configuration mismatch without ``remeasure``,
        unreachable scheduler.
    """
    t_start = time.monotonic()
    paths = [os.fspath(p) for p in paths]
    measure = measure or MeasureSettings()
    settings = settings or IngestSettings()
    summary = IngestSummary()
    config_id = config_id_of(measure)
    others = _foreign_records(store, config_id)
    if others and not remeasure:
        raise IngestError(settings_mismatch_message(
            store, measure, others, "they must be measured again: run with --remeasure, or use the configuration "
                                    "the store was built with, or a new store"))
    config_id = store.register_config(measure)
    store.commit()
    scan_paths(paths, settings.patterns)  # validate the paths before starting any worker
    total = sum(1 for _ in scan_paths(paths, settings.patterns)) if progress else 0

    # a scheduler is reached at once (an unreachable one is an error before any work); local
    # processes start only when there is work, so a re-run with nothing new starts none
    backend = _DaskBackend(scheduler, settings.connect_timeout_s) if scheduler else \
        _LocalBackend(settings.worker_count)
    bar = _Progress(total, progress_stream or sys.stdout) if progress else None
    window = backend.workers * settings.in_flight_per_worker
    pending: dict = {}              # future -> ("hash"|"measure", payload)
    to_measure: deque = deque()     # (path, size, mtime_ns, digest) awaiting a measure task
    in_flight: dict = {}            # digest being measured -> extra (path, size, mtime) items to link
    remeasure_digests: set = set()  # digests measured again (their config differs)
    writes: list = []               # MeasuredFile results not yet committed
    links: list = []                # (path, size, mtime_ns, digest) not yet committed
    quarantine: deque = deque()     # (kind, [item]) suspects of a worker crash, run one at a time
    alone: set = set()              # futures of suspects, each submitted with nothing else in flight
    crashes = 0                     # culprits found since the last successful task
    last_commit = time.monotonic()
    done_paths = 0

    def is_current(digest: str) -> bool | None:
        state = store.content_state(digest)
        if state is None:
            return None
        return state[0] == config_id and state[2] == MEASUREMENT_VERSION

    def commit(force: bool = False) -> None:
        nonlocal last_commit
        n = len(writes) + len(links)
        if not n or (not force and n < settings.commit_every_files
                     and time.monotonic() - last_commit < settings.commit_every_s):
            return
        store.add(writes, config_id)
        for item in links:
            store.link(*item)
        store.commit()
        writes.clear()
        links.clear()
        last_commit = time.monotonic()

    def classify_hashed(path, size, mtime_ns, digest, error):
        summary.hashed += 1
        if digest is None:
            not_stored(path, error, "unreadable")
        else:
            route(path, size, mtime_ns, digest)

    def not_stored(path, reason, kind):
        """A file neither measured nor stored this run (``kind`` "unreadable" or "error"); tried again next run."""
        nonlocal done_paths
        if kind == "error":
            summary.errors += 1
            summary.error_reasons[reason_group(reason)] += 1
        else:
            summary.unreadable += 1
            summary.unreadable_reasons[reason_group(reason)] += 1
        done_paths += 1
        tell = on_error or on_skip
        if tell:
            tell(path, reason)

    def drop_copies(digest, reason, kind):
        """Paths waiting on a content that was not stored: not linked either, with the same outcome."""
        nonlocal done_paths
        for path, *_ in in_flight.pop(digest, None) or ():
            summary.known -= 1  # counted as known when they joined
            done_paths -= 1
            not_stored(path, reason, kind)

    def route(path, size, mtime_ns, digest, link=True):
        nonlocal done_paths
        if digest in in_flight:
            in_flight[digest].append((path, size, mtime_ns, digest))
            summary.known += 1
            done_paths += 1
            return
        cur = is_current(digest)
        if cur:
            if link:  # a stat hit is linked already
                links.append((path, size, mtime_ns, digest))
            summary.known += 1
            done_paths += 1
            return
        if cur is False:
            remeasure_digests.add(digest)
        in_flight[digest] = []
        to_measure.append((path, size, mtime_ns, digest))

    def record(requested: list[tuple], results: list[MeasuredFile]):
        nonlocal done_paths
        for (_, _, _, asked), r in zip(requested, results):
            status, reason = r.record["status"], r.record.get("reason")
            if status in ("ok", "skipped") and r.measure_version != MEASUREMENT_VERSION:
                status, reason = "error", (f"the worker runs measurement code version {r.measure_version}, this "
                                           f"polecast {MEASUREMENT_VERSION}; install the same polecast on every "
                                           f"worker")
            if status not in ("ok", "skipped"):  # an error or unreadable: not a result
                kind = "error" if status == "error" else "unreadable"
                drop_copies(asked, reason, kind)
                not_stored(r.path, reason, kind)
                continue
            writes.append(r)
            copies = in_flight.pop(asked, None) or ()
            if r.digest == asked:  # same content seen at other paths while it was being measured
                links.extend((path, size, mtime_ns, asked) for path, size, mtime_ns, _ in copies)
            else:  # the file was replaced after hashing: its copies still hold the hashed bytes
                summary.known -= len(copies)
                done_paths -= len(copies)
                for item in copies:
                    route(*item)
            if status == "ok":
                summary.new_ok += 1
            else:
                summary.new_skipped += 1
                summary.skip_reasons[reason_group(reason)] += 1
                if on_skip:
                    on_skip(r.path, reason)
            if r.digest in remeasure_digests:
                summary.remeasured += 1
                remeasure_digests.discard(r.digest)
            done_paths += 1

    def submit_measure(items):
        resubmit("measure", items)

    def fill(scan_chunks):
        # measuring first keeps the window draining; hashing feeds it
        while len(pending) < window and to_measure:
            n = min(settings.measure_chunk_files, len(to_measure))
            submit_measure([to_measure.popleft() for _ in range(n)])
        while len(pending) < window and len(to_measure) < window * settings.measure_chunk_files:
            chunk = next(scan_chunks, None)
            if chunk is None:
                return False
            unknown = []
            for path in chunk:
                try:
                    st = os.stat(path)
                except OSError as exc:
                    not_stored(path, f"cannot read file: {exc.strerror or exc}", "unreadable")
                    continue
                digest = store.digest_for_stat(path, st.st_size, st.st_mtime_ns)
                if digest is None:
                    unknown.append(path)
                else:
                    route(path, st.st_size, st.st_mtime_ns, digest, link=False)
            if bar:
                bar.update(done_paths, summary.new)
            if unknown:
                pending[backend.submit(hash_files, unknown)] = ("hash", unknown)
            while len(pending) < window and to_measure:
                n = min(settings.measure_chunk_files, len(to_measure))
                submit_measure([to_measure.popleft() for _ in range(n)])
        return True

    def failed(kind, payload, exc, ran_alone):
        """A task raised or its worker died: find the file, measure the bystanders, never poison the store."""
        nonlocal crashes
        detail = f"{type(exc).__name__}: {' '.join(str(exc).split())}"[:300]
        if isinstance(exc, cf.process.BrokenProcessPool):
            backend.restart()
            if not ran_alone:  # any task in flight may have killed the worker: run each file alone
                quarantine.extend((kind, [item]) for item in payload)
                return
            crashes += 1
            if crashes > _MAX_CRASHES_WITHOUT_PROGRESS:
                raise IngestError(f"worker processes keep dying ({detail}); {crashes} files in a row killed "
                                  f"their worker; everything committed so far is kept; run again once the cause "
                                  f"is fixed")
            give_up(kind, payload[0], f"worker process died while measuring it ({detail})")
        elif len(payload) > 1:  # isolate the file: one per task
            for item in payload:
                resubmit(kind, [item])
        else:
            give_up(kind, payload[0], f"worker failed: {detail}")

    def give_up(kind, item, reason):
        """The worker failed on this file alone: an error, not stored; the next run tries it again."""
        if kind == "measure":
            drop_copies(item[3], reason, "error")
            not_stored(item[0], reason, "error")
        else:
            not_stored(item, reason, "error")

    def resubmit(kind, payload):
        if kind == "hash":
            fut = backend.submit(hash_files, payload)
            pending[fut] = ("hash", payload)
            return fut
        fut = backend.submit(measure_files, payload, measure)
        pending[fut] = ("measure", payload)
        return fut

    scan_chunks = _chunks(scan_paths(paths, settings.patterns), settings.hash_chunk_files)
    more = True
    try:
        while True:
            if quarantine:  # suspects of a worker crash: one at a time, nothing else in flight
                if not pending:
                    alone.add(resubmit(*quarantine.popleft()))
            elif more:
                more = fill(scan_chunks)
            elif to_measure:
                fill(iter(()))
            if not pending:
                if not more and not to_measure and not quarantine:
                    break
                continue
            for fut in backend.wait_some(pending):
                kind, payload = pending.pop(fut)
                ran_alone = fut in alone
                alone.discard(fut)
                try:
                    result = fut.result()
                except Exception as exc:
                    failed(kind, payload, exc, ran_alone)
                    continue
                crashes = 0
                if kind == "hash":
                    for item in result:
                        classify_hashed(*item)
                else:
                    record(payload, result)
            commit()
            if bar:
                bar.update(done_paths, summary.new)
    except BaseException:  # interrupted or failed: keep every finished result, then re-raise
        try:
            commit(force=True)
        except Exception:  # pragma: no cover - the store itself failed; its last commit stands
            pass
        raise
    else:
        commit(force=True)
    finally:
        if bar:
            bar.close()
        backend.close()
    stale = _foreign_records(store, config_id)
    summary.stale_config = sum(stale.values())
    summary.elapsed_s = time.monotonic() - t_start
    return summary
