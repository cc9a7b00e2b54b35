"""The watched-folder service (pipeline.watch, `matchbay watch`): real files, real watchdog.

Three layers:
* the pieces: names, moves, sidecars, options, the completion rule (real files, a
  controlled clock), and the rule fed by the real inotify observer;
* the service end to end, in this process (no worker processes) and as a real
  `matchbay watch` subprocess (worker processes, signals).
The 500-file kill/restart test is in test_watch_burst.py.
"""

from __future__ import annotations

import os
import queue
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from sample_data import antenna_files

from pipeline.errors import ConfigError
from pipeline.watch import (CLOSE_SETTLE_S, EMPTY_FILE_WAIT_S, REASON_SUFFIX, CompletionTracker,
                            WatchOptions, _start_observer, destination, is_sweep_name, move_file,
                            write_reason)

REPO = Path(__file__).resolve().parents[1]
BAND = "902M:928M"
POINTS = 401


# --- sample data -----------------------------------------------------------------------------

def malformed(content: bytes, kind: str) -> bytes:
    """A broken copy: 'truncated' mid-row (a transfer cut short) or 'abc' in a data row."""
    lines = content.split(b"\n")
    data_rows = [i for i, line in enumerate(lines) if line[:1].isdigit()]
    if kind == "truncated":
        row = data_rows[len(data_rows) // 2]
        first_value = lines[row].split(b" ")[0]
        return b"\n".join(lines[:row] + [first_value + b" "])
    row = data_rows[len(data_rows) // 3]
    lines[row] = lines[row].replace(b" ", b" abc ", 1)
    return b"\n".join(lines)


def write_in_chunks(path: Path, content: bytes, chunks: int, pause_s: float) -> None:
    """Write ``content`` through one open file in ``chunks`` pieces split at line ends
    (so any prefix parses as a shorter sweep), pausing ``pause_s`` between pieces."""
    cuts = [content.rfind(b"\n", 0, len(content) * k // chunks) + 1 for k in range(1, chunks)]
    pieces = [content[a:b] for a, b in zip([0] + cuts, cuts + [len(content)])]
    with open(path, "wb") as fh:
        for piece in pieces:
            fh.write(piece)
            fh.flush()
            time.sleep(pause_s)


def store_units(store_path: Path):
    from pipeline.store import ResultsStore

    with ResultsStore(store_path, mode="r") as store:
        return store.units_frame(latest_only=False), store.failures_frame()


def settings(**overrides):
    from pipeline.process import Settings

    return Settings(band_hz=(902e6, 928e6), **overrides)


CLI = [sys.executable, "-c", "import sys; from pipeline.cli import main; sys.exit(main(sys.argv[1:]))"]


def run_cli(*args, timeout=120) -> subprocess.CompletedProcess:
    """`matchbay ARGS` as a real subprocess (worker processes, signals)."""
    return subprocess.run([*CLI, *map(str, args)], cwd=REPO, capture_output=True, text=True, timeout=timeout)


def start_cli(*args, stdout=subprocess.PIPE, stderr=subprocess.PIPE) -> subprocess.Popen:
    """`matchbay ARGS` started as a real subprocess, text I/O."""
    return subprocess.Popen([*CLI, *map(str, args)], cwd=REPO, stdout=stdout, stderr=stderr, text=True)


# --- names, moves, sidecars ------------------------------------------------------------------

@pytest.mark.parametrize("name, taken", [
    ("unit7.s1p", True), ("UNIT7.S1P", True), ("unit7.s2p", True), ("unit7.ts", True),
    ("unit7.s1p.part", False), ("unit7.s1p.tmp", False), (".unit7.s1p", False),
    ("~unit7.s1p", False), ("unit7.txt", False), ("unit7.s1p.reason.txt", False),
])
def test_only_finished_touchstone_names_are_taken(name, taken):
    assert is_sweep_name(name) is taken


def test_destination_keeps_sub_folders_and_never_reuses_a_name(tmp_path):
    inbox, done = tmp_path / "in", tmp_path / "done"
    (inbox / "lot7").mkdir(parents=True)
    src = inbox / "lot7" / "unit1.s1p"
    src.write_text("x")
    assert destination(src, inbox, done) == done / "lot7" / "unit1.s1p"
    (done / "lot7").mkdir(parents=True)
    (done / "lot7" / "unit1.s1p").write_text("earlier file")
    (done / "lot7" / "unit1~2.s1p").write_text("earlier file 2")
    target = destination(src, inbox, done)
    assert target == done / "lot7" / "unit1~3.s1p"
    move_file(src, target)
    assert target.read_text() == "x" and not src.exists()
    assert (done / "lot7" / "unit1.s1p").read_text() == "earlier file"


def test_move_refuses_to_overwrite(tmp_path):
    src, target = tmp_path / "a.s1p", tmp_path / "b.s1p"
    src.write_text("new")
    target.write_text("old")
    with pytest.raises(FileExistsError):
        move_file(src, target)
    assert src.read_text() == "new" and target.read_text() == "old"


def test_move_across_filesystems_copies_then_removes(tmp_path):
    other = Path("/dev/shm")
    if not other.is_dir() or os.stat(other).st_dev == os.stat(tmp_path).st_dev:
        pytest.skip("needs a second filesystem (/dev/shm as tmpfs)")
    src = tmp_path / "unit1.s1p"
    src.write_bytes(b"content")
    target = other / f"matchbay-test-{os.getpid()}" / "unit1.s1p"
    try:
        move_file(src, target)
        assert target.read_bytes() == b"content" and not src.exists()
        assert list(target.parent.iterdir()) == [target]       # no temporary left behind
    finally:
        target.unlink(missing_ok=True)
        target.parent.rmdir()


def test_reason_sidecar_is_written_whole(tmp_path):
    target = tmp_path / "rejected" / "sub" / "unit3.s1p"
    sidecar = write_reason(target, "reason: bad row\n")
    assert sidecar == target.with_name("unit3.s1p" + REASON_SUFFIX)
    assert sidecar.read_text() == "reason: bad row\n"
    assert sorted(p.name for p in sidecar.parent.iterdir()) == [sidecar.name]


def test_status_line_counts_and_last_result():
    from pipeline.watch import WatchStatus

    status = WatchStatus(stored=7, already_stored=2, rejected=1, waiting=3, in_hand=2,
                         last="u9.s1p: RL 5.0 -> 15.0 dB")
    assert status.done == 9
    assert status.line() == ("done 9 (2 already stored) · rejected 1 · waiting 3 · in hand 2"
                             " · last: u9.s1p: RL 5.0 -> 15.0 dB")


# --- options -------------------------------------------------------------------------------

def test_options_defaults_and_relative_folders(tmp_path):
    o = WatchOptions.build(tmp_path, {})
    assert (o.done_dir, o.rejected_dir) == (tmp_path / "done", tmp_path / "rejected")
    assert (o.stable_s, o.polling, o.keep_processed, o.trust_close) == (0.5, False, False, True)
    o = WatchOptions.build(tmp_path, {"done_dir": "../archive", "stable_s": 2}, stable_s=1.5)
    assert o.done_dir == (tmp_path / "../archive").absolute() and o.stable_s == 1.5


@pytest.mark.parametrize("table, key", [
    ({"stabel_s": 1.0}, "watch.stabel_s"),            # a typo must not pass silently
    ({"stable_s": "fast"}, "watch.stable_s"),
    ({"stable_s": 0}, "watch.stable_s"),
    ({"polling": "yes"}, "watch.polling"),
    ({"workers": 1.5}, "watch.workers"),
    ({"done_dir": "."}, "watch.done_dir"),           # the watched folder itself
    ({"rejected_dir": ".."}, "watch.rejected_dir"),  # a folder that contains it
])
def test_bad_watch_options_name_the_key(tmp_path, table, key):
    with pytest.raises(ConfigError) as caught:
        WatchOptions.build(tmp_path, table, where="station.toml")
    assert caught.value.key == key and "station.toml" in str(caught.value)


def test_a_bad_command_line_value_names_the_flag(tmp_path):
    with pytest.raises(ConfigError) as caught:
        WatchOptions.build(tmp_path, {"stable_s": 2.0}, where="station.toml", stable_s=-1.0)
    assert caught.value.key == "--stable" and caught.value.where == "command line"


def test_missing_folder_is_refused(tmp_path):
    with pytest.raises(ConfigError, match="does not exist"):
        WatchOptions.build(tmp_path / "nowhere", {})


def test_example_station_is_valid(tmp_path):
    from pipeline.cli.options import build_settings, load_station

    station = load_station("example-station")
    options = WatchOptions.build(tmp_path, station["watch"], where=station["_path"])
    assert options.done_dir == tmp_path / "done" and options.workers == 2
    s = build_settings(band=None, station=station)
    assert s.band_hz == (902e6, 928e6) and s.series == "E24"


# --- the completion rule, with real files and a controlled clock -----------------------------

def grow(path: Path, text: str) -> None:
    with open(path, "a") as fh:
        fh.write(text)


def ready_paths(tracker, now):
    complete, vanished = tracker.poll(now)
    return [r.path for r in complete], vanished


def test_stable_size_and_mtime_make_a_file_complete(tmp_path):
    p = tmp_path / "a.s1p"
    p.write_text("header\n")
    t = CompletionTracker(0.5, closes_reported=False)
    t.created(str(p), 0.0)
    assert ready_paths(t, 0.0) == ([], [])            # first sample; the next is due at 0.5
    grow(p, "more\n")
    assert ready_paths(t, 0.5) == ([], [])            # changed: the wait starts again
    assert ready_paths(t, 0.9) == ([], [])            # unchanged for 0.4 s only
    assert ready_paths(t, 1.0) == ([str(p)], [])      # unchanged across samples 0.5 s apart
    assert len(t) == 0


def test_a_file_written_since_its_last_close_waits_for_the_close(tmp_path):
    p = tmp_path / "a.s1p"
    p.write_text("half")
    t = CompletionTracker(0.5, closes_reported=True)
    t.created(str(p), 0.0)
    t.modified(str(p), 0.0)
    for now in (0.0, 1.0, 5.0, 60.0):                 # a writer that pauses for a minute
        assert ready_paths(t, now) == ([], [])
    t.closed(str(p), 60.0)
    assert ready_paths(t, 60.0) == ([], [])
    assert ready_paths(t, 60.0 + CLOSE_SETTLE_S) == ([str(p)], [])


def test_reopened_after_close_falls_back_to_the_stability_window(tmp_path):
    p = tmp_path / "a.s1p"
    p.write_text("x")
    t = CompletionTracker(0.5, closes_reported=True)
    t.closed(str(p), 0.0)
    t.opened(str(p), 0.05)
    assert ready_paths(t, 0.0) == ([], [])
    assert ready_paths(t, 0.2) == ([], [])            # no close short-cut any more
    assert ready_paths(t, 0.5) == ([str(p)], [])


def test_without_trust_in_closes_the_window_decides(tmp_path):
    p = tmp_path / "a.s1p"
    p.write_text("x")
    t = CompletionTracker(0.5, closes_reported=True, trust_close=False)
    t.modified(str(p), 0.0)
    t.closed(str(p), 0.0)
    assert ready_paths(t, 0.0) == ([], [])
    assert ready_paths(t, 0.3) == ([], [])
    assert ready_paths(t, 0.5) == ([str(p)], [])


def test_renamed_into_place_is_complete_at_once(tmp_path):
    p = tmp_path / "a.s1p"
    p.write_text("x")
    t = CompletionTracker(0.5, closes_reported=True)
    t.created(str(tmp_path / "a.s1p.part"), 0.0)
    t.moved(str(tmp_path / "a.s1p.part"), str(p), 0.0)
    assert ready_paths(t, 0.0) == ([str(p)], [])
    assert len(t) == 0


def test_an_empty_file_gets_time_for_its_writer_to_start(tmp_path):
    p = tmp_path / "a.s1p"
    p.touch()
    t = CompletionTracker(0.5, closes_reported=False)
    t.created(str(p), 0.0)
    assert ready_paths(t, 0.0) == ([], [])
    assert ready_paths(t, 1.0) == ([], [])
    assert ready_paths(t, EMPTY_FILE_WAIT_S) == ([str(p)], [])


def test_a_file_removed_before_it_was_read_is_reported(tmp_path):
    p = tmp_path / "a.s1p"
    p.write_text("x")
    t = CompletionTracker(0.5, closes_reported=False)
    t.created(str(p), 0.0)
    p.unlink()
    assert ready_paths(t, 0.0) == ([], [str(p)])
    assert len(t) == 0


def test_after_lost_events_the_writer_flag_is_dropped(tmp_path):
    p = tmp_path / "a.s1p"
    p.write_text("x")
    t = CompletionTracker(0.5, closes_reported=True)
    t.modified(str(p), 0.0)
    assert ready_paths(t, 10.0) == ([], [])
    t.forget_writers()                                 # the close may have been lost
    assert ready_paths(t, 10.5) == ([str(p)], [])


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="inotify close events are Linux-only")
def test_real_inotify_events_never_call_a_half_written_file_complete(tmp_path):
    """A writer that pauses longer than the stability window while the file is open."""
    content = antenna_files(1)[0]
    options = WatchOptions.build(tmp_path, {"stable_s": 0.3})
    inbox: queue.Queue = queue.Queue()
    observer, closes_reported = _start_observer(options, inbox, os.path.realpath(tmp_path))
    assert closes_reported
    tracker = CompletionTracker(options.stable_s, closes_reported=True)
    path = os.path.join(os.path.realpath(tmp_path), "slow.s1p")
    writer = threading.Thread(target=write_in_chunks, args=(Path(path), content, 4, 0.8))
    judged_complete_at_size = []
    try:
        writer.start()
        deadline = time.monotonic() + 15
        while not judged_complete_at_size and time.monotonic() < deadline:
            try:
                while True:
                    _, kind, src, dest = inbox.get(timeout=0.05)
                    if kind == "moved":
                        tracker.moved(src, dest, time.monotonic())
                    elif kind in ("created", "modified", "closed", "opened"):
                        getattr(tracker, kind)(src, time.monotonic())
            except queue.Empty:
                pass
            complete, _ = tracker.poll(time.monotonic())
            judged_complete_at_size += [r.size for r in complete]
    finally:
        writer.join()
        observer.stop()
        observer.join()
    assert judged_complete_at_size == [len(content)]


# --- the service end to end ------------------------------------------------------------------

class WatcherThread:
    """A FolderWatcher running in a thread of this process (no worker processes)."""

    def __init__(self, folder: Path, store_path: Path, **watch_table):
        from pipeline.store import ResultsStore
        from pipeline.watch import FolderWatcher

        self.options = WatchOptions.build(folder, {"workers": 0, "stable_s": 0.3, **watch_table})
        self.store = ResultsStore(store_path, mode="a")
        self.watcher = FolderWatcher(self.options, settings(), self.store)
        self.status = None
        self._thread = threading.Thread(target=self._run)

    def _run(self):
        self.status = self.watcher.run()

    def __enter__(self):
        self._thread.start()
        wait_until(lambda: self.watcher._tracker is not None, 10)
        return self

    def __exit__(self, *exc):
        self.watcher.request_stop()
        self._thread.join(timeout=30)
        self.store.close()


def wait_until(condition, timeout_s: float) -> bool:
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        if condition():
            return True
        time.sleep(0.05)
    return condition()


def files_under(folder: Path) -> list[str]:
    return sorted(str(p.relative_to(folder)) for p in folder.rglob("*") if p.is_file())


def test_once_processes_the_backlog_and_accounts_for_every_file(tmp_path):
    inbox, store_path = tmp_path / "inbox", tmp_path / "results.h5"
    (inbox / "lot2").mkdir(parents=True)
    good = antenna_files(4, seed=1)
    for i, content in enumerate(good[:3]):
        (inbox / f"unit{i}.s1p").write_bytes(content)
    (inbox / "lot2" / "unit3.s1p").write_bytes(good[3])
    (inbox / "lot2" / "copy-of-unit0.s1p").write_bytes(good[0])     # same content again
    (inbox / "cut.s1p").write_bytes(malformed(good[1], "truncated"))
    (inbox / "typo.s1p").write_bytes(malformed(good[2], "abc"))
    (inbox / "unit9.s1p.part").write_bytes(good[1])                  # still being copied
    (inbox / "notes.txt").write_text("not a sweep")

    result = run_cli("watch", inbox, "--store", store_path, "--band", BAND, "--once", "--workers", 1)

    assert result.returncode == 0, result.stderr
    assert "done 5 (4 stored, 1 already stored), rejected 2" in result.stdout
    assert files_under(inbox) == sorted([
        "done/unit0.s1p", "done/unit1.s1p", "done/unit2.s1p", "done/lot2/unit3.s1p",
        "done/lot2/copy-of-unit0.s1p",
        "rejected/cut.s1p", "rejected/cut.s1p.reason.txt",
        "rejected/typo.s1p", "rejected/typo.s1p.reason.txt",
        "unit9.s1p.part", "notes.txt"])
    cut_line = malformed(good[1], "truncated").count(b"\n") + 1        # the last line, cut short
    assert f"cut.s1p:{cut_line}: data row has 1 values" in (inbox / "rejected/cut.s1p.reason.txt").read_text()
    assert "non-numeric value 'abc'" in (inbox / "rejected/typo.s1p.reason.txt").read_text()
    units, failures = store_units(store_path)
    assert len(units) == 4 and units["source_sha256"].is_unique and set(units["n_points"]) == {POINTS}
    assert sorted(Path(s).name for s in failures["source"]) == ["cut.s1p", "typo.s1p"]


def test_restart_after_commit_but_before_move_stores_nothing_twice(tmp_path):
    """The crash window between "record committed" and "file moved"."""
    from pipeline.process import process_file
    from pipeline.store import ResultsStore

    inbox, store_path = tmp_path / "inbox", tmp_path / "results.h5"
    inbox.mkdir()
    path = inbox / "unit0.s1p"
    path.write_bytes(antenna_files(1)[0])
    with ResultsStore(store_path, mode="a") as store:
        store.append(process_file(path, settings()))            # committed; then "killed"
    result = run_cli("watch", inbox, "--store", store_path, "--band", BAND, "--once", "--workers", 0)
    assert result.returncode == 0, result.stderr
    assert "done 1 (0 stored, 1 already stored)" in result.stdout
    assert files_under(inbox) == ["done/unit0.s1p"]
    assert len(store_units(store_path)[0]) == 1


def test_restart_after_failure_recorded_but_before_move_finishes_the_rejection(tmp_path):
    """The crash windows after "failure recorded" and after "sidecar written"."""
    from pipeline.acquire import sha256_file
    from pipeline.store import ResultsStore

    inbox, store_path = tmp_path / "inbox", tmp_path / "results.h5"
    inbox.mkdir()
    first, second = inbox / "bad1.s1p", inbox / "bad2.s1p"
    first.write_bytes(malformed(antenna_files(1)[0], "abc"))
    second.write_bytes(b"! header only\n# Hz S RI R 50\n")
    digest = settings().digest()
    with ResultsStore(store_path, mode="a") as store:
        for p in (first, second):
            store.append_failure(str(p), sha256_file(p), "earlier run", settings_hash=digest)
    (inbox / "rejected").mkdir()
    (inbox / "rejected" / ("bad2.s1p" + REASON_SUFFIX)).write_text("orphan from the crash")
    result = run_cli("watch", inbox, "--store", store_path, "--band", BAND, "--once", "--workers", 0)
    assert result.returncode == 0, result.stderr
    assert files_under(inbox) == ["rejected/bad1.s1p", "rejected/bad1.s1p.reason.txt",
                                  "rejected/bad2.s1p", "rejected/bad2.s1p.reason.txt"]
    assert "no data rows" in (inbox / "rejected" / ("bad2.s1p" + REASON_SUFFIX)).read_text()
    assert len(store_units(store_path)[1]) == 2                 # each failure recorded once


def test_kept_in_place_files_are_stored_once_over_many_runs(tmp_path):
    inbox, store_path = tmp_path / "inbox", tmp_path / "results.h5"
    inbox.mkdir()
    for i, content in enumerate(antenna_files(3, seed=2)):
        (inbox / f"unit{i}.s1p").write_bytes(content)
    for run, expected in ((1, "done 3 (3 stored, 0 already stored)"),
                          (2, "done 3 (0 stored, 3 already stored)")):
        result = run_cli("watch", inbox, "--store", store_path, "--band", BAND, "--once", "--keep",
                         "--workers", 0)
        assert result.returncode == 0, result.stderr
        assert expected in result.stdout, f"run {run}"
    assert files_under(inbox) == ["unit0.s1p", "unit1.s1p", "unit2.s1p"]
    assert len(store_units(store_path)[0]) == 3


def test_live_watch_takes_files_however_they_arrive(tmp_path):
    inbox, outside, store_path = tmp_path / "inbox", tmp_path / "elsewhere", tmp_path / "results.h5"
    inbox.mkdir()
    outside.mkdir()
    sweeps = antenna_files(6, seed=3)
    with WatcherThread(inbox, store_path) as running:
        (inbox / "plain.s1p").write_bytes(sweeps[0])                       # write and close
        slow = threading.Thread(target=write_in_chunks,                    # open, pauses > stable_s
                                args=(inbox / "slow.s1p", sweeps[1], 4, 0.7))
        slow.start()
        (inbox / "atomic.s1p.part").write_bytes(sweeps[2])                 # rename into place
        os.replace(inbox / "atomic.s1p.part", inbox / "atomic.s1p")
        (outside / "moved-in.s1p").write_bytes(sweeps[3])                  # rename from outside:
        os.replace(outside / "moved-in.s1p", inbox / "moved-in.s1p")       # "created" only
        (inbox / "new-lot").mkdir()
        (inbox / "new-lot" / "sub.s1p").write_bytes(sweeps[4])             # a new sub-folder
        (inbox / "bad.s1p").write_bytes(malformed(sweeps[5], "truncated"))
        slow.join()
        expected = ["done/atomic.s1p", "done/moved-in.s1p", "done/new-lot/sub.s1p", "done/plain.s1p",
                    "done/slow.s1p", "rejected/bad.s1p", "rejected/bad.s1p.reason.txt"]
        assert wait_until(lambda: files_under(inbox) == expected, 20), files_under(inbox)
        gone = inbox / "gone.s1p"
        with open(gone, "wb") as fh:                                       # removed while waiting
            fh.write(sweeps[5][:100])
            fh.flush()
            assert wait_until(lambda: running.watcher.status.waiting == 1, 5)
            gone.unlink()
        assert wait_until(lambda: running.watcher.status.vanished == 1, 5)
    status = running.status
    assert (status.stored, status.rejected, status.waiting, status.in_hand) == (5, 1, 0, 0)
    units, failures = store_units(store_path)
    assert set(units["n_points"]) == {POINTS}                             # none read half-written
    assert len(failures) == 1


def test_polling_observer_for_network_shares(tmp_path):
    inbox, store_path = tmp_path / "inbox", tmp_path / "results.h5"
    inbox.mkdir()
    sweeps = antenna_files(2, seed=4)
    with WatcherThread(inbox, store_path, polling=True, poll_interval_s=0.2, stable_s=0.6) as running:
        (inbox / "a.s1p").write_bytes(sweeps[0])
        write_in_chunks(inbox / "b.s1p", sweeps[1], 3, 0.2)              # pauses < stable_s
        assert wait_until(lambda: files_under(inbox) == ["done/a.s1p", "done/b.s1p"], 20), files_under(inbox)
    assert running.status.stored == 2
    assert set(store_units(store_path)[0]["n_points"]) == {POINTS}


def test_a_reader_can_follow_the_store_while_the_watcher_writes(tmp_path):
    from pipeline.store import ResultsStore

    inbox, store_path = tmp_path / "inbox", tmp_path / "results.h5"
    inbox.mkdir()
    sweeps = antenna_files(4, seed=5)
    with WatcherThread(inbox, store_path):
        with ResultsStore(store_path, mode="r") as reader:              # held open throughout
            seen = [len(reader)]
            for i, content in enumerate(sweeps):
                (inbox / f"unit{i}.s1p").write_bytes(content)
                assert wait_until(lambda: len(reader) == i + 1, 10)
                seen.append(len(reader))
    assert seen == [0, 1, 2, 3, 4]
    assert files_under(inbox) == [f"done/unit{i}.s1p" for i in range(4)]


def test_a_reader_holding_the_store_before_the_watcher_starts_only_delays_it(tmp_path):
    from pipeline.store import ResultsStore

    inbox, store_path = tmp_path / "inbox", tmp_path / "results.h5"
    inbox.mkdir()
    (inbox / "unit0.s1p").write_bytes(antenna_files(1, seed=9)[0])
    ResultsStore(store_path, mode="a").close()
    reader = ResultsStore(store_path, mode="r")
    log = tmp_path / "watch.log"
    with open(log, "w") as err:
        proc = start_cli("watch", inbox, "--store", store_path, "--band", BAND, "--once", "--workers", "0",
                         stderr=err)
    try:
        assert wait_until(lambda: "opening the store" in log.read_text(), 30)
        time.sleep(2.0)
        assert proc.poll() is None and not (inbox / "done").exists()   # waiting for the reader
        reader.close()
        out, _ = proc.communicate(timeout=60)
    finally:
        reader.close()
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, log.read_text()
    assert "done 1 (1 stored" in out and files_under(inbox) == ["done/unit0.s1p"]


@pytest.mark.parametrize("stop_signal", [signal.SIGTERM, signal.SIGINT])
def test_a_stop_signal_finishes_the_files_in_hand_and_exits_zero(tmp_path, stop_signal):
    inbox, store_path = tmp_path / "inbox", tmp_path / "results.h5"
    inbox.mkdir()
    proc = start_cli("watch", inbox, "--store", store_path, "--band", BAND, "--workers", "1")
    try:
        for i, content in enumerate(antenna_files(30, seed=6)):
            (inbox / f"unit{i:02d}.s1p").write_bytes(content)
        assert wait_until(lambda: (inbox / "done").is_dir() and any((inbox / "done").iterdir()), 60)
        proc.send_signal(stop_signal)
        out, err = proc.communicate(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, err
    assert "stop requested" in err and "done " in out
    units, _ = store_units(store_path)
    done = {p.name for p in (inbox / "done").iterdir()}
    left = {p.name for p in inbox.glob("*.s1p")}
    assert len(done) + len(left) == 30 and not done & left            # nothing lost or doubled
    assert {Path(s).name for s in units["source"]} == done            # stored == moved to done
    from pipeline.store import ResultsStore

    ResultsStore(store_path, mode="a", timeout_s=1).close()           # closed: a writer gets in


def spawned_workers(pid: int) -> list[int]:
    """Worker processes of a watcher (children started by multiprocessing's spawn)."""
    try:
        children = Path(f"/proc/{pid}/task/{pid}/children").read_text().split()
        return [int(c) for c in children if b"spawn_main" in Path(f"/proc/{c}/cmdline").read_bytes()]
    except OSError:
        return []


@pytest.mark.skipif(not Path("/proc/self/task").is_dir(), reason="finds the worker through /proc")
def test_a_worker_killed_mid_file_is_replaced_and_the_file_read_again(tmp_path):
    inbox, store_path = tmp_path / "inbox", tmp_path / "results.h5"
    inbox.mkdir()
    proc = start_cli("watch", inbox, "--store", store_path, "--band", BAND, "--workers", "1")
    try:
        assert wait_until(lambda: spawned_workers(proc.pid), 60)
        first_worker = spawned_workers(proc.pid)[0]
        for i, content in enumerate(antenna_files(20, seed=8)):
            (inbox / f"unit{i:02d}.s1p").write_bytes(content)
        assert wait_until(lambda: (inbox / "done").is_dir() and any((inbox / "done").iterdir()), 60)
        os.kill(first_worker, signal.SIGKILL)
        assert wait_until(lambda: len(list((inbox / "done").iterdir())) == 20, 60)
        assert spawned_workers(proc.pid) != [first_worker]
        proc.send_signal(signal.SIGTERM)
        out, err = proc.communicate(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert proc.returncode == 0, err
    assert "a worker process died" in err
    units, _ = store_units(store_path)
    assert len(units) == 20 and units["source_sha256"].is_unique


@pytest.mark.parametrize("args, message", [
    (["watch", "/nonexistent/inbox", "--store", "x.h5", "--band", BAND], "does not exist"),
    (["watch", ".", "--band", BAND], "a results store is required"),
])
def test_bad_command_lines_give_one_line_and_status_2(args, message):
    result = run_cli(*args)
    assert result.returncode == 2
    assert message in result.stderr and len(result.stderr.strip().splitlines()) == 1


def test_an_unknown_watch_key_in_a_station_file_is_named(tmp_path):
    station = tmp_path / "bench.toml"
    station.write_text(f'band = "{BAND}"\n[watch]\nstable_seconds = 2\n')
    result = run_cli("watch", tmp_path, "--store", tmp_path / "r.h5", "--config", station)
    assert result.returncode == 2
    assert "watch.stable_seconds: unknown key" in result.stderr and str(station) in result.stderr
    assert not (tmp_path / "r.h5").exists()                           # nothing half-written
