"""The watched-folder service: every Touchstone file that lands in a folder is processed once.

A test station's analyzer (or an operator) saves sweep files into a folder, often a
network share. :class:`FolderWatcher` de-embeds, matches and stores each one without
anyone running a command, and accounts for every file:

* a good file is stored once and moved to the done folder (or left in place);
* a file whose content is already stored with the same settings is moved as done and not
  stored again;
* a bad file is moved to the rejected folder beside a ``<name>.reason.txt`` sidecar and
  its failure is recorded in the store;
* a file removed before it was read is logged; nothing is ever deleted.

Shape (the watcher process stays light; see the project's library notes, section 5)::

    watchdog observer thread ─► message queue ─► main thread: completion rule, hashing,
    periodic rescans ─────────┘                   store writes, moves, status
                                                        │ ▲
                                                        ▼ │ records / reasons
                                                  worker processes: parse, de-embed, match

Completion rule (:class:`CompletionTracker`): a file is complete when

1. it was renamed into place (``on_moved`` destination): an atomic rename means done; or
2. a local writer closed it after writing (inotify ``IN_CLOSE_WRITE``) and it stayed
   unopened and unchanged for :data:`CLOSE_SETTLE_S`; or
3. otherwise, its size and mtime were unchanged across two samples ``stable_s`` apart.

Under inotify a file written to since its last close is held open by a writer and is
never complete, however long the writer pauses. Parse success is the last check: a file
that is complete by these rules but does not parse is rejected. After an inotify queue
overflow (events lost) the writer flags are dropped and a rescan runs at once; periodic
rescans also catch events dropped at ``stop()`` and polling gaps.

Crash safety, for a watcher killed at any moment (SIGKILL, a crash; a power cut can lose
what the operating system had not yet written, see :mod:`pipeline.store`): a good file is
committed to the store first and moved second, so a restart finds it in the folder, sees
its hash in the store and moves it as done without a second record. A bad file has its
failure recorded first, then the sidecar written, then the file moved; a restart reads it
again (failures are deterministic), sees the failure is already recorded, and finishes the
sidecar and the move (an orphan sidecar left by the crash is overwritten with the same
reason).
"""

from __future__ import annotations

import datetime as _dt
import errno
import logging
import multiprocessing
import os
import queue
import shutil
import signal
import threading
import time
import traceback
from collections import deque
from concurrent.futures import CancelledError, Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass, field
from pathlib import Path

from pipeline.batch import is_touchstone
from pipeline.config import check_keys
from pipeline.errors import ConfigError, MatchbayError

log = logging.getLogger(__name__)

CLOSE_SETTLE_S = 0.1        # quiet time after IN_CLOSE_WRITE before a file counts as complete, s
EMPTY_FILE_WAIT_S = 5.0     # an empty file must stay empty this long (a writer may not have started), s
MAX_READ_ATTEMPTS = 3       # reads that fail with an OS error (share hiccup) before the file is rejected
RETRY_DELAY_S = 1.0         # first retry delay after such a failure; doubles each time, s
REASON_SUFFIX = ".reason.txt"
TEMP_SUFFIXES = (".part", ".partial", ".tmp", ".temp", ".crdownload", ".swp")
MAX_WAIT_S = 0.2            # longest sleep of the main loop (how soon a stop request is seen), s
COMMIT_WINDOW_S = 0.05      # records back within this time share one store commit (one flush), s
COMMIT_BATCH = 32           # ... up to this many

#: [watch] keys of a station file, with their defaults (``workers``: all cores); ``folder`` and
#: ``store`` are read by the command. Relative folders are relative to the watched folder.
WATCH_DEFAULTS = {
    "done_dir": "done", "rejected_dir": "rejected", "keep_processed": False, "stable_s": 0.5,
    "trust_close": True, "polling": False, "poll_interval_s": 2.0, "rescan_s": 10.0, "workers": None,
}
WATCH_KEYS = frozenset(WATCH_DEFAULTS) | {"folder", "store"}


# --- options -------------------------------------------------------------------------------

@dataclass(frozen=True)
class WatchOptions:
    """How the service watches. Paths are absolute; times in seconds.

    folder          : the watched folder (recursively).
    done_dir        : processed files move here, keeping their sub-folders.
    rejected_dir    : bad files move here, each beside a ``.reason.txt`` sidecar.
    keep_processed  : leave processed files where they are instead of moving them.
    stable_s        : size and mtime must stay unchanged this long (completion rule 3).
    trust_close     : a close after writing makes a file complete (rule 2). Set it false for
                      a writer that closes and reopens the file between pieces; then the
                      stability window decides (a close still ends the writer flag).
    polling         : use watchdog's PollingObserver (network shares: inotify does not see
                      other clients' writes) instead of the native observer.
    poll_interval_s : the polling observer's interval.
    rescan_s        : full rescan of the folder this often (catches lost events).
    workers         : worker processes; 0 processes in the watcher process itself.
    """

    folder: Path
    done_dir: Path
    rejected_dir: Path
    keep_processed: bool
    stable_s: float
    trust_close: bool
    polling: bool
    poll_interval_s: float
    rescan_s: float
    workers: int

    @classmethod
    def build(cls, folder: str | Path, table: dict | None = None, *, where: str = "[watch]",
              **flags) -> "WatchOptions":
        """Options from a station's ``[watch]`` table (``where`` names its file), overridden
        by command-line values ``flags`` (same keys; None = not given)."""
        table = dict(table or {})
        check_keys(table, WATCH_KEYS, where=where, section="watch")
        root = Path(folder).expanduser().absolute()
        if not root.is_dir():
            raise ConfigError("the watched folder does not exist (or is not a folder)", where=str(folder))
        values = {}
        for key, default in WATCH_DEFAULTS.items():
            if flags.get(key) is not None:
                value, place, label = flags[key], "command line", "--" + _FLAGS[key]
            elif key in table:
                value, place, label = table[key], where, f"watch.{key}"
            else:
                value, place, label = default, "default", key
            values[key] = _checked(key, value, root, place, label)
        options = cls(folder=root, **values)
        options._check_folders(where)
        return options

    def _check_folders(self, where: str) -> None:
        watched = os.path.realpath(self.folder)
        for key, path in (("done_dir", self.done_dir), ("rejected_dir", self.rejected_dir)):
            real = os.path.realpath(path)
            if real == watched or watched.startswith(real + os.sep):
                raise ConfigError(f"{path} must not be the watched folder or one that contains it",
                                  where=where, key=f"watch.{key}")


_FLAGS = {"done_dir": "done", "rejected_dir": "rejected", "keep_processed": "keep", "stable_s": "stable",
          "trust_close": "trust-close", "polling": "polling", "poll_interval_s": "poll-interval",
          "rescan_s": "rescan", "workers": "workers"}


def _checked(key: str, value, root: Path, where: str, label: str):
    """One [watch] value, type- and range-checked; folders made absolute."""
    def wrong(expected: str):
        return ConfigError(f"must be {expected}, not {value!r}", where=where, key=label)

    if key in ("done_dir", "rejected_dir"):
        if not isinstance(value, (str, Path)) or not str(value):
            raise wrong("a folder path")
        return (root / Path(value).expanduser()).absolute()
    if key == "workers":
        if value is None:
            return os.cpu_count() or 1
        if isinstance(value, bool) or not isinstance(value, int) or value < 0:
            raise wrong("a whole number >= 0")
        return value
    if isinstance(WATCH_DEFAULTS[key], bool):
        if not isinstance(value, bool):
            raise wrong("true or false")
        return value
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not value > 0:
        raise wrong("a positive number of seconds")
    return float(value)


def is_sweep_name(name: str) -> bool:
    """A file name the service takes: a Touchstone name, not hidden, not a temporary."""
    base = os.path.basename(name)
    if base.startswith((".", "~")) or base.lower().endswith(TEMP_SUFFIXES):
        return False
    return is_touchstone(base)


# --- the completion rule -------------------------------------------------------------------

@dataclass
class Candidate:
    """A file seen in the folder but not yet complete. Times are ``time.monotonic()`` s."""

    path: str
    first_seen: float
    size: int = -1
    mtime_ns: int = -1
    unchanged_since: float = 0.0
    closed: bool = False       # closed after writing, not opened nor written since (inotify)
    renamed: bool = False      # renamed into place
    writing: bool = False      # written since its last close: a writer holds it (inotify)
    due: float = 0.0           # when to look at it next
    attempts: int = 0          # reads that failed with an OS error


@dataclass(frozen=True)
class Ready:
    """A complete file, with the size and mtime it had when judged complete."""

    path: str
    size: int
    mtime_ns: int
    attempts: int = 0


class CompletionTracker:
    """Files seen but not yet complete, and the rule that decides when they are.

    ``closes_reported`` is True under inotify (close-after-write events exist); then a
    file written to since its last close is never complete. ``trust_close`` enables rule 2.
    Every method takes ``now`` (``time.monotonic()`` seconds), so the rule can be tested
    with a controlled clock.
    """

    def __init__(self, stable_s: float, *, closes_reported: bool, trust_close: bool = True):
        self.stable_s = stable_s
        self.closes_reported = closes_reported
        self.trust_close = trust_close
        self._files: dict[str, Candidate] = {}

    def __len__(self) -> int:
        return len(self._files)

    def __contains__(self, path: str) -> bool:
        return path in self._files

    def add(self, path: str, now: float, *, delay: float = 0.0, attempts: int = 0) -> Candidate:
        """Start tracking ``path`` (seen by an event or a scan); no-op if tracked."""
        c = self._files.get(path)
        if c is None:
            c = self._files[path] = Candidate(path, first_seen=now, due=now + delay, attempts=attempts)
        return c

    def created(self, path: str, now: float) -> None:
        self.add(path, now)

    def modified(self, path: str, now: float) -> None:
        c = self.add(path, now)
        c.closed = c.renamed = False
        c.writing = self.closes_reported
        c.unchanged_since = now          # a write, even one the mtime's resolution hides
        c.due = min(c.due, now)

    def opened(self, path: str, now: float) -> None:
        """Someone opened a tracked file (maybe to write again): no close short-cut."""
        c = self._files.get(path)
        if c is not None:
            c.closed = False

    def closed(self, path: str, now: float) -> None:
        c = self.add(path, now)
        c.closed, c.writing = True, False
        c.unchanged_since = now          # the settle time runs from the close
        c.due = now

    def moved(self, src: str | None, dest: str | None, now: float) -> None:
        """A rename: ``dest`` (None if outside the watch) is complete; ``src`` is gone."""
        if src is not None:
            self._files.pop(src, None)
        if dest is not None:
            c = self.add(dest, now)
            c.renamed, c.writing = True, False
            c.due = now

    def deleted(self, path: str) -> bool:
        """Forget a removed file; True if it was being tracked."""
        return self._files.pop(path, None) is not None

    def forget_writers(self) -> None:
        """After lost events (queue overflow): a close may have been lost, use rule 3."""
        for c in self._files.values():
            c.writing = c.closed = False

    def drop_older_than(self, age_s: float, now: float) -> list[str]:
        """Stop tracking files first seen more than ``age_s`` ago (``--once`` patience)."""
        old = [p for p, c in self._files.items() if now - c.first_seen > age_s]
        for p in old:
            del self._files[p]
        return old

    def next_due(self) -> float | None:
        return min((c.due for c in self._files.values()), default=None)

    def poll(self, now: float) -> tuple[list[Ready], list[str]]:
        """Sample the files that are due: (complete files, files that vanished)."""
        complete, vanished = [], []
        for c in [c for c in self._files.values() if c.due <= now]:
            try:
                st = os.stat(c.path)
            except FileNotFoundError:
                vanished.append(c.path)
                del self._files[c.path]
                continue
            except OSError as error:      # a share that went away for a moment
                log.debug("cannot stat %s (%s); will look again", c.path, error)
                c.due = now + self.stable_s
                continue
            if (st.st_size, st.st_mtime_ns) != (c.size, c.mtime_ns):
                c.size, c.mtime_ns, c.unchanged_since = st.st_size, st.st_mtime_ns, now
            wait = self._wait_needed(c)
            if wait is not None and now - c.unchanged_since >= wait:
                complete.append(Ready(c.path, c.size, c.mtime_ns, c.attempts))
                del self._files[c.path]
            else:
                c.due = now + (wait if wait is not None else self.stable_s)
        return complete, vanished

    def _wait_needed(self, c: Candidate) -> float | None:
        """Seconds unchanged that make ``c`` complete; None while a writer holds it."""
        if c.size == 0:
            return max(EMPTY_FILE_WAIT_S, self.stable_s)
        if c.renamed:
            return 0.0
        if c.writing:
            return None
        if c.closed and self.trust_close:
            return CLOSE_SETTLE_S
        return self.stable_s


# --- moving files without ever overwriting -------------------------------------------------

def destination(src: str | Path, folder: str | Path, dest_root: Path) -> Path:
    """Where ``src`` (inside ``folder``) goes under ``dest_root``: the same sub-folders and a
    free name (``unit7.s1p``, else ``unit7~2.s1p``, ``unit7~3.s1p`` ...)."""
    relative = Path(os.path.relpath(src, folder))
    target = dest_root / relative
    n = 2
    while os.path.lexists(target):
        target = dest_root / relative.parent / f"{relative.stem}~{n}{relative.suffix}"
        n += 1
    return target


def move_file(src: str | Path, target: Path) -> None:
    """Move ``src`` to ``target``, never over an existing file. Raises ``OSError``.

    A rename (``os.replace``) on the same filesystem; across filesystems a copy to a
    temporary name, a rename, then removal of the original, so a crash leaves the input
    in place and never half a copy under the final name.
    """
    if os.path.lexists(target):
        raise FileExistsError(errno.EEXIST, "destination exists", str(target))
    target.parent.mkdir(parents=True, exist_ok=True)
    try:
        os.replace(src, target)
    except OSError as error:
        if error.errno != errno.EXDEV:
            raise
        partial = target.with_name(target.name + ".partial")
        shutil.copy2(src, partial)
        os.replace(partial, target)
        os.unlink(src)


def write_reason(target: Path, text: str) -> Path:
    """Write the sidecar ``<target>.reason.txt`` atomically (temporary name, rename)."""
    sidecar = target.with_name(target.name + REASON_SUFFIX)
    sidecar.parent.mkdir(parents=True, exist_ok=True)
    partial = sidecar.with_name(sidecar.name + ".partial")
    partial.write_text(text, encoding="utf-8")
    os.replace(partial, sidecar)
    return sidecar


# --- the work done in worker processes -----------------------------------------------------

_WORKER_SETTINGS = None


def _start_worker(settings, parent_pid: int) -> None:
    """Worker initialiser: keep the settings, leave signals to the parent, die with it."""
    global _WORKER_SETTINGS
    _WORKER_SETTINGS = settings
    signal.signal(signal.SIGINT, signal.SIG_IGN)       # Ctrl-C reaches the whole group;
    signal.signal(signal.SIGTERM, signal.SIG_IGN)      # the parent finishes and stops us
    threading.Thread(target=_exit_when_orphaned, args=(parent_pid,), daemon=True).start()
    import pipeline.process  # noqa: F401  (import the pipeline before the first file)


def _exit_when_orphaned(parent_pid: int) -> None:
    """A watcher killed with SIGKILL cannot stop its workers; they notice and exit."""
    while os.getppid() == parent_pid:
        time.sleep(1.0)
    os._exit(0)


def _process_in_worker(path: str):
    return process_one(path, _WORKER_SETTINGS)


def _warm_up() -> None:
    """A no-op task: submitting one per worker starts them all before the first file."""


def process_one(path: str, settings) -> tuple[str, object]:
    """One file through the pipeline: ("record", UnitRecord), ("bad", reason), ("oserror", text)
    or ("bug", traceback) for an error that is not the file's fault."""
    from pipeline.process import process_file

    try:
        return "record", process_file(path, settings)
    except MatchbayError as error:
        return "bad", str(error)
    except OSError as error:
        return "oserror", f"cannot read: {error.strerror or error}"
    except Exception:  # a bug must not stop the station; the file is set aside with it
        return "bug", traceback.format_exc()


class _Workers:
    """A process pool (spawned, so the watchdog threads are not forked), or inline work.

    ``generation`` counts pool restarts, so that the many futures a broken pool fails
    cause one restart, not one each.
    """

    def __init__(self, count: int, settings):
        self.count = count
        self.settings = settings
        self.generation = 0
        self._pool: ProcessPoolExecutor | None = None
        if count:
            self._start()

    def _start(self) -> None:
        self._pool = ProcessPoolExecutor(
            max_workers=self.count, mp_context=multiprocessing.get_context("spawn"),
            initializer=_start_worker, initargs=(self.settings, os.getpid()))
        for f in [self._pool.submit(_warm_up) for _ in range(self.count)]:
            f.result()                       # all workers up before the first file

    def submit(self, path: str) -> Future:
        if self._pool is None:
            future: Future = Future()
            future.set_result(process_one(path, self.settings))
            return future
        return self._pool.submit(_process_in_worker, path)

    def restart(self, generation: int) -> None:
        """Replace the pool of ``generation`` if it is still the current one (it broke: a
        worker died of memory exhaustion or a crash in a library)."""
        if self._pool is not None and generation == self.generation:
            self._pool.shutdown(wait=False, cancel_futures=True)
            self.generation += 1
            self._start()

    def close(self) -> None:
        if self._pool is not None:
            self._pool.shutdown(wait=True, cancel_futures=True)
            self._pool = None


# --- events from watchdog ------------------------------------------------------------------

def _make_event_handler(inbox: "queue.Queue"):
    """A watchdog handler that only forwards (kind, src, dest) tuples to ``inbox``."""
    from watchdog.events import FileSystemEventHandler

    class Forwarder(FileSystemEventHandler):
        def on_any_event(self, event) -> None:
            if not event.is_directory:
                inbox.put(("fs", event.event_type, os.fsdecode(event.src_path),
                           os.fsdecode(event.dest_path) if event.dest_path else ""))

    return Forwarder()


def _start_observer(options: WatchOptions, inbox: "queue.Queue", real_folder: str):
    """The native observer (inotify on Linux) or the polling one; returns (observer, closes_reported)."""
    from watchdog import events as ev
    from watchdog.observers import Observer
    from watchdog.observers.polling import PollingObserver

    if options.polling:
        observer = PollingObserver(timeout=options.poll_interval_s)
    else:
        observer = Observer()
    wanted = [ev.FileCreatedEvent, ev.FileModifiedEvent, ev.FileMovedEvent, ev.FileDeletedEvent,
              ev.FileClosedEvent, ev.FileOpenedEvent]
    observer.schedule(_make_event_handler(inbox), real_folder, recursive=True, event_filter=wanted)
    observer.start()
    closes_reported = type(observer).__name__ == "InotifyObserver"   # close events: Linux only
    return observer, closes_reported


class _OverflowAlarm(logging.Handler):
    """watchdog reports an inotify queue overflow only in its log; this turns it into a flag."""

    def __init__(self):
        super().__init__(level=logging.WARNING)
        self.raised = threading.Event()

    def emit(self, record: logging.LogRecord) -> None:
        if "overflow" in record.getMessage().lower():
            self.raised.set()


# --- status --------------------------------------------------------------------------------

@dataclass
class WatchStatus:
    """Counts since the service started, and the last result (one line)."""

    stored: int = 0             # new records committed
    already_stored: int = 0     # content already in the store: moved as done, not stored again
    rejected: int = 0
    vanished: int = 0           # removed before they were read
    waiting: int = 0            # seen, not yet complete or not yet dispatched
    in_hand: int = 0            # being processed
    left_waiting: int = 0       # --once: still changing at the end, left for the next run
    last: str = ""

    @property
    def done(self) -> int:
        return self.stored + self.already_stored

    def line(self) -> str:
        text = (f"done {self.done} ({self.already_stored} already stored) · rejected {self.rejected}"
                f" · waiting {self.waiting} · in hand {self.in_hand}")
        if self.vanished:
            text += f" · vanished {self.vanished}"
        return text + (f" · last: {self.last}" if self.last else "")


def describe_record(record) -> str:
    """'RL 4.1 -> 17.9 dB (shunt C 3.3 pF, series L 12 nH)': worst return loss over the band."""
    from pipeline.units import format_si

    symbol = {"inductor": ("L", "H"), "capacitor": ("C", "F"), "resistor": ("R", "ohm")}
    parts = []
    for e in record.elements:
        letter, unit = symbol.get(e["kind"], (e["kind"], ""))
        parts.append(f"{e['position']} {letter} {format_si(e['value'], unit)}")
    network = ", ".join(parts) or "no network needed"
    return f"RL {record.rl_before_worst_db:.1f} -> {record.rl_after_worst_db:.1f} dB ({network})"


# --- the service ---------------------------------------------------------------------------

@dataclass
class _Job:
    ready: Ready
    sha256: str
    future: Future = field(repr=False)
    generation: int = 0           # of the worker pool that runs it


class FolderWatcher:
    """Watch ``options.folder`` and process every Touchstone file into ``store``.

    store    : an open :class:`pipeline.store.ResultsStore` (this process is its only writer).
    settings : a :class:`pipeline.process.Settings`.
    on_status: called with the :class:`WatchStatus` after every change (for a status line).

    :meth:`run` returns the final status. :meth:`request_stop` (safe from a signal
    handler) makes it finish the files in hand and return.
    """

    def __init__(self, options: WatchOptions, settings, store, *, on_status=None):
        self.options = options
        self.settings = settings
        self.store = store
        self.status = WatchStatus()
        self._on_status = on_status or (lambda status: None)
        self._digest = settings.digest()
        self._real_folder = os.path.realpath(options.folder)
        self._excluded = tuple(os.path.realpath(p) + os.sep for p in (options.done_dir, options.rejected_dir))
        self._inbox: queue.Queue = queue.Queue()
        self._ready: deque[Ready] = deque()              # complete, waiting for a worker
        self._queued: set[str] = set()                   # the paths in self._ready
        self._jobs: dict[str, _Job] = {}
        self._finished: list[tuple[Ready, object]] = []  # records back from the workers, to commit
        self._first_finished_at = 0.0                     # when the oldest of them came back
        self._settled: dict[str, tuple[int, int]] = {}    # left in place: path -> (size, mtime_ns)
        self._stop_requested = False
        self._stop_announced = False
        self._tracker: CompletionTracker | None = None
        self._workers: _Workers | None = None

    def request_stop(self) -> None:
        """Finish the files in hand, then return from :meth:`run` (signal-handler safe)."""
        self._stop_requested = True

    # -- main loop --

    def run(self, *, once: bool = False) -> WatchStatus:
        """Process the backlog, then (unless ``once``) watch until :meth:`request_stop`."""
        alarm = _OverflowAlarm()
        observer = None
        watchdog_log = logging.getLogger("watchdog.observers")
        watchdog_log.addHandler(alarm)
        self._workers = _Workers(self.options.workers, self.settings)
        try:
            closes_reported = False
            if not once:
                try:
                    observer, closes_reported = _start_observer(self.options, self._inbox, self._real_folder)
                except OSError as error:     # e.g. the inotify watch limit
                    raise ConfigError(f"cannot watch this folder: {error} (try --polling, or "
                                      "raise fs.inotify.max_user_watches)",
                                      where=str(self.options.folder)) from None
            self._tracker = CompletionTracker(self.options.stable_s, closes_reported=closes_reported,
                                              trust_close=self.options.trust_close)
            self._log_start(observer)
            self._loop(once, alarm)
        finally:
            watchdog_log.removeHandler(alarm)
            if observer is not None:
                observer.stop()
                observer.join()
            self._workers.close()
        self._publish()
        return self.status

    def _loop(self, once: bool, alarm: _OverflowAlarm) -> None:
        tracker = self._tracker
        once_patience = max(30.0, 10 * self.options.stable_s)
        self._rescan(time.monotonic())
        next_rescan = time.monotonic() + self.options.rescan_s
        while True:
            self._take_messages(self._sleep_time(next_rescan))
            now = time.monotonic()
            if alarm.raised.is_set():
                alarm.raised.clear()
                log.warning("filesystem events were lost (inotify queue overflow); rescanning %s",
                            self.options.folder)
                tracker.forget_writers()
                next_rescan = now
            if now >= next_rescan and not once:
                self._rescan(now)
                next_rescan = now + self.options.rescan_s
            complete, vanished = tracker.poll(now)
            self._ready.extend(complete)
            self._queued.update(r.path for r in complete)
            for path in vanished:
                self._vanished(path)
            if once:
                self._give_up_on(tracker.drop_older_than(once_patience, now))
            if not self._stop_requested:
                self._dispatch()
            elif not self._stop_announced:
                self._stop_announced = True
                log.info("stop requested: finishing the %d file(s) in hand", len(self._jobs))
            self._publish()
            busy = self._jobs or self._finished
            if (self._stop_requested and not busy) or (once and not (busy or self._ready or len(tracker))):
                break

    def _sleep_time(self, next_rescan: float) -> float:
        if self._ready and len(self._jobs) < self._max_jobs() and not self._stop_requested:
            return 0.0
        now = time.monotonic()
        wake = min(next_rescan, self._tracker.next_due() or next_rescan)
        if self._finished:
            wake = min(wake, self._first_finished_at + COMMIT_WINDOW_S)
        return max(0.0, min(MAX_WAIT_S, wake - now))

    def _max_jobs(self) -> int:
        return max(2, 2 * self.options.workers)

    def _take_messages(self, timeout: float) -> None:
        """Handle queued messages (filesystem events, finished jobs); wait up to ``timeout``."""
        try:
            message = self._inbox.get(timeout=timeout) if timeout > 0 else self._inbox.get_nowait()
        except queue.Empty:
            message = None
        for _ in range(10000):          # bounded, so a flood of events cannot starve the rest
            if message is None:
                break
            if message[0] == "fs":
                self._on_fs_event(*message[1:])
            else:
                self._finish(message[1])
            try:
                message = self._inbox.get_nowait()
            except queue.Empty:
                break
        if self._commit_due():
            self._commit_finished()

    def _commit_due(self) -> bool:
        """Commit now, or wait a moment for more records to share the commit?"""
        if not self._finished:
            return False
        return (not self._jobs or self._stop_requested or len(self._finished) >= COMMIT_BATCH
                or time.monotonic() - self._first_finished_at >= COMMIT_WINDOW_S)

    # -- events and scans --

    def _wanted(self, path: str) -> bool:
        """A sweep file in the folder that is not already queued or being processed."""
        return (bool(path) and is_sweep_name(path) and path.startswith(self._real_folder + os.sep)
                and not path.startswith(self._excluded) and path not in self._jobs
                and path not in self._queued and os.sep + "." not in path[len(self._real_folder):])

    def _on_fs_event(self, kind: str, src: str, dest: str) -> None:
        now, tracker = time.monotonic(), self._tracker
        if kind == "moved":
            src_ok, dest_ok = self._wanted(src), self._wanted(dest)
            self._settled.pop(src, None)
            if src_ok or dest_ok:
                self._settled.pop(dest, None)
                tracker.moved(src if src_ok else None, dest if dest_ok else None, now)
            return
        if not self._wanted(src):
            return
        if kind == "deleted":
            self._settled.pop(src, None)
            if tracker.deleted(src):
                self._vanished(src)
        elif kind in ("created", "modified", "closed"):
            if src in self._settled and kind != "modified" and self._unchanged(src):
                return                   # our own look at a file left in place
            if src not in tracker and not os.path.exists(src):
                return                   # a late event for a file already handled, or gone
            self._settled.pop(src, None)
            getattr(tracker, kind)(src, now)
        elif kind == "opened":
            tracker.opened(src, now)

    def _unchanged(self, path: str) -> bool:
        try:
            st = os.stat(path)
        except OSError:
            return False
        return self._settled.get(path) == (st.st_size, st.st_mtime_ns)

    def _rescan(self, now: float) -> None:
        """Walk the folder (not done/rejected, not hidden) and track every new sweep file."""
        found = 0
        for path in self._walk():
            if path in self._tracker or path in self._jobs or path in self._queued:
                continue
            if path in self._settled:
                if self._unchanged(path):
                    continue
                del self._settled[path]
            self._tracker.add(path, now)
            found += 1
        if found:
            log.info("scan found %d file(s) to look at", found)

    def _walk(self):
        stack = [self._real_folder]
        while stack:
            folder = stack.pop()
            try:
                entries = list(os.scandir(folder))
            except OSError as error:
                log.warning("cannot list %s: %s", folder, error)
                continue
            for entry in entries:
                if entry.name.startswith("."):
                    continue
                if entry.is_dir(follow_symlinks=False):
                    if not (entry.path + os.sep).startswith(self._excluded):
                        stack.append(entry.path)
                elif is_sweep_name(entry.name) and entry.is_file():
                    yield entry.path

    # -- dispatch and results --

    def _dispatch(self) -> None:
        from pipeline.acquire import sha256_file

        while self._ready and len(self._jobs) < self._max_jobs():
            ready = self._ready.popleft()
            self._queued.discard(ready.path)
            if self._changed_since(ready):
                self._tracker.add(ready.path, time.monotonic())
                continue
            try:
                sha = sha256_file(ready.path)
            except FileNotFoundError:
                self._vanished(ready.path)
                continue
            except OSError as error:
                self._retry_or_reject(ready, "", f"cannot read: {error.strerror or error}")
                continue
            if self.store.contains(sha, self._digest):
                self._file_done(ready, None, already=True)
                continue
            future = self._workers.submit(ready.path)
            self._jobs[ready.path] = _Job(ready, sha, future, self._workers.generation)
            future.add_done_callback(lambda _f, p=ready.path: self._inbox.put(("job", p)))

    def _finish(self, path: str) -> None:
        job = self._jobs.pop(path, None)
        if job is None:
            return
        try:
            kind, value = job.future.result()
        except (BrokenProcessPool, CancelledError):
            self._worker_died(job)
            return
        if not os.path.exists(path):
            self._vanished(path)
            return
        if self._changed_since(job.ready) or (kind == "record" and value.source_sha256 != job.sha256):
            log.info("%s changed while it was being read; reading it again", self._rel(path))
            self._tracker.add(path, time.monotonic())
            return
        if kind == "record":
            if not self._finished:
                self._first_finished_at = time.monotonic()
            self._finished.append((job.ready, value))
        elif kind == "bad":
            self._reject(job.ready, job.sha256, value)
        elif kind == "oserror":
            self._retry_or_reject(job.ready, job.sha256, value)
        else:
            log.error("internal error while processing %s (the file is set aside; please report):\n%s",
                      path, value)
            self._reject(job.ready, job.sha256, "internal error: " + value.strip().splitlines()[-1])

    @staticmethod
    def _changed_since(ready: Ready) -> bool:
        """The file differs from when it was judged complete: written again meanwhile.
        (A file that is gone is not "changed": the caller finds out it is gone.)"""
        try:
            st = os.stat(ready.path)
        except OSError:
            return False
        return (st.st_size, st.st_mtime_ns) != (ready.size, ready.mtime_ns)

    def _worker_died(self, job: _Job) -> None:
        """The pool broke with this file in hand: restart it once, read the file again."""
        if job.generation == self._workers.generation and not self._stop_requested:
            log.error("a worker process died while reading %s; restarting the workers",
                      self._rel(job.ready.path))
            self._workers.restart(job.generation)
        attempts = job.ready.attempts + 1
        if attempts >= MAX_READ_ATTEMPTS:
            self._reject(job.ready, job.sha256, "a worker process died each time this file was read")
        elif not self._stop_requested:
            self._tracker.add(job.ready.path, time.monotonic(), attempts=attempts)

    def _retry_or_reject(self, ready: Ready, sha: str, reason: str) -> None:
        attempts = ready.attempts + 1
        if attempts >= MAX_READ_ATTEMPTS:
            self._reject(ready, sha, reason)
            return
        delay = RETRY_DELAY_S * 2 ** (attempts - 1)
        log.warning("%s: %s; trying again in %.0f s", self._rel(ready.path), reason, delay)
        self._tracker.add(ready.path, time.monotonic(), delay=delay, attempts=attempts)

    # -- outcomes: store first, move second --

    def _commit_finished(self) -> None:
        """Store the records that came back (one commit for all), then move their files."""
        finished, self._finished = self._finished, []
        new, outcomes = {}, []
        for ready, record in finished:
            key = record.source_sha256
            already = key in new or self.store.contains(key, self._digest)
            if not already:
                new[key] = record
            outcomes.append((ready, record, already))
        if new:
            self.store.append_many(list(new.values()))     # committed when it returns
        for ready, record, already in outcomes:
            self._file_done(ready, record, already=already)

    def _file_done(self, ready: Ready, record, *, already: bool) -> None:
        """Count, log and move (or leave) a file whose record is in the store."""
        name = self._rel(ready.path)
        if already:
            self.status.already_stored += 1
            result = "already stored with these settings"
        else:
            self.status.stored += 1
            result = describe_record(record)
        self.status.last = f"{name}: {result}"
        if self.options.keep_processed:
            self._settled[ready.path] = (ready.size, ready.mtime_ns)
            log.info("%s: %s", name, result)
            return
        target = destination(ready.path, self._real_folder, self.options.done_dir)
        if self._move(ready, target):
            log.info("%s: %s -> %s", name, result, target)

    def _reject(self, ready: Ready, sha: str, reason: str) -> None:
        name = self._rel(ready.path)
        if not (sha and self.store.has_failure(sha, self._digest)):
            self.store.append_failure(ready.path, sha, reason, lot=self.settings.lot,
                                      settings_hash=self._digest)
        target = destination(ready.path, self._real_folder, self.options.rejected_dir)
        write_reason(target, self._reason_text(name, sha, reason))
        self.status.rejected += 1
        self.status.last = f"{name}: rejected: {reason}"
        if self._move(ready, target):
            log.warning("rejected %s: %s -> %s", name, reason, target)

    def _reason_text(self, name: str, sha: str, reason: str) -> str:
        when = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
        return (f"reason: {reason}\nfile: {name}\nsha256: {sha or '(unreadable)'}\n"
                f"settings: {self._digest}\nrejected at: {when}\n")

    def _move(self, ready: Ready, target: Path) -> bool:
        try:
            move_file(ready.path, target)
            return True
        except FileNotFoundError:
            log.warning("%s was removed before it could be moved", self._rel(ready.path))
        except OSError as error:
            log.error("cannot move %s to %s: %s (left in place)", self._rel(ready.path), target, error)
            self._settled[ready.path] = (ready.size, ready.mtime_ns)
        return False

    def _vanished(self, path: str) -> None:
        self.status.vanished += 1
        log.warning("%s was removed before it was read", self._rel(path))

    def _give_up_on(self, paths: list[str]) -> None:
        for path in paths:
            self.status.left_waiting += 1
            log.warning("%s is still changing; left for the next run", self._rel(path))

    # -- reporting --

    def _rel(self, path: str) -> str:
        return os.path.relpath(path, self._real_folder)

    def _publish(self) -> None:
        self.status.waiting = len(self._ready) + (len(self._tracker) if self._tracker else 0)
        self.status.in_hand = len(self._jobs) + len(self._finished)
        self._on_status(self.status)

    def _log_start(self, observer) -> None:
        o = self.options
        how = ("once (backlog only)" if observer is None else
               f"polling every {o.poll_interval_s:g} s" if o.polling else type(observer).__name__)
        done = "left in place" if o.keep_processed else str(o.done_dir)
        workers = f"{o.workers} worker process(es)" if o.workers else "no worker processes"
        log.info("watching %s (%s, stable after %g s, rescan every %g s, %s); settings %s; "
                 "done -> %s; rejected -> %s", o.folder, how, o.stable_s, o.rescan_s, workers,
                 self._digest[:12], done, o.rejected_dir)
