"""The watcher under a burst: 500 files, 5 % malformed, some written slowly, SIGKILL mid-way.

A real `matchbay watch` subprocess (real inotify observer, worker processes, HDF5 store) is
killed with SIGKILL while files are still arriving, restarted, and left to drain the folder.
Then: every good file is in the store exactly once, every bad one is in rejected/ with its
reason (and recorded once), and no input file is gone.
"""

from __future__ import annotations

import hashlib
import os
import random
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import pytest

from sample_data import antenna_files
from test_watch import BAND, POINTS, malformed, start_cli, store_units, wait_until, write_in_chunks

N_FILES = 500
N_BAD = N_FILES // 20           # 5 % malformed
N_SLOW = 40                     # written through one open file, in chunks with pauses
KILL_AFTER_DONE = 120           # SIGKILL once this many files are in done/


def start_watcher(inbox: Path, store: Path, log: Path) -> subprocess.Popen:
    """`matchbay watch` with default settings, once it has started watching (logs to ``log``)."""
    started = log.read_text().count("INFO watching ")
    with open(log, "a") as err:
        proc = start_cli("watch", inbox, "--store", store, "--band", BAND, stdout=subprocess.DEVNULL, stderr=err)
    assert wait_until(lambda: log.read_text().count("INFO watching ") > started, 60), log.read_text()
    return proc


def worker_pids(pid: int) -> list[int]:
    try:
        return [int(p) for p in Path(f"/proc/{pid}/task/{pid}/children").read_text().split()]
    except OSError:
        return []


def has_exited(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return True
    return state in ("Z", "X")


def sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def feed(inbox: Path, files: list[tuple[str, bytes, str]]) -> None:
    """Write the burst: most files at once, some renamed into place, some slowly in chunks."""
    rng = random.Random(7)
    slow_writers = []
    for name, content, how in files:
        path = inbox / name
        path.parent.mkdir(parents=True, exist_ok=True)
        if how == "slow":
            t = threading.Thread(target=write_in_chunks,
                                 args=(path, content, rng.randint(3, 6), rng.uniform(0.05, 0.3)))
            t.start()
            slow_writers.append(t)
        elif how == "rename":
            part = path.with_name(path.name + ".part")
            part.write_bytes(content)
            os.replace(part, path)
        else:
            path.write_bytes(content)
        time.sleep(0.02)             # ~10 s of arrivals: still arriving when the watcher dies
    for t in slow_writers:
        t.join()


@pytest.mark.slow
@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="SIGKILL and inotify: Linux")
def test_burst_with_a_kill_and_restart_loses_nothing_and_doubles_nothing(tmp_path):
    inbox, store, log = tmp_path / "inbox", tmp_path / "results.h5", tmp_path / "watch.log"
    inbox.mkdir()
    log.touch()
    sweeps = antenna_files(N_FILES, seed=11)
    good, bad = sweeps[:N_FILES - N_BAD], [malformed(c, ("truncated", "abc")[i % 2])
                                             for i, c in enumerate(sweeps[N_FILES - N_BAD:])]
    rng = random.Random(3)
    files = [(f"lot{i % 3}/unit{i:03d}.s1p", c, "plain") for i, c in enumerate(good)]
    files += [(f"lot{i % 3}/bad{i:02d}.s1p", c, "plain") for i, c in enumerate(bad)]
    rng.shuffle(files)
    for i in rng.sample(range(N_FILES), N_SLOW):
        files[i] = (files[i][0], files[i][1], "slow")
    for i in rng.sample([i for i in range(N_FILES) if files[i][2] == "plain"], 50):
        files[i] = (files[i][0], files[i][1], "rename")

    first = start_watcher(inbox, store, log)
    watchers = [first]
    writer = threading.Thread(target=feed, args=(inbox, files))
    writer.start()
    done = inbox / "done"
    try:
        assert wait_until(lambda: sum(1 for _ in done.rglob("*.s1p")) >= KILL_AFTER_DONE, 60)
        workers = worker_pids(first.pid)
        assert len(workers) >= 2                     # the pool (and multiprocessing's tracker)
        first.send_signal(signal.SIGKILL)
        first.wait(timeout=10)
        assert writer.is_alive(), "the burst should still be arriving when the watcher dies"
        second = start_watcher(inbox, store, log)
        watchers.append(second)
        writer.join()
        # orphaned workers of the killed watcher notice and exit
        assert wait_until(lambda: all(has_exited(p) for p in workers), 10), workers

        def drained():
            left = [p for p in inbox.rglob("*.s1p") if not p.is_relative_to(done)
                    and not p.is_relative_to(inbox / "rejected")]
            return not left
        assert wait_until(drained, 60), log.read_text()[-3000:]
        second.send_signal(signal.SIGTERM)
        assert second.wait(timeout=30) == 0, log.read_text()[-3000:]
    finally:
        for proc in watchers:
            if proc.poll() is None:
                proc.kill()
        writer.join()

    assert "removed before" not in log.read_text()                   # no file went missing
    units, failures = store_units(store)
    good_shas, bad_shas = {sha(c) for c in good}, {sha(c) for c in bad}
    # every good file in the store exactly once, none read half-written
    assert sorted(units["source_sha256"]) == sorted(good_shas)
    assert set(units["n_points"]) == {POINTS}
    # every bad one in rejected/ with its reason, and its failure recorded once
    rejected = inbox / "rejected"
    rejected_files = list(rejected.rglob("*.s1p"))
    assert sorted(sha(p.read_bytes()) for p in rejected_files) == sorted(bad_shas)
    for p in rejected_files:
        reason = p.with_name(p.name + ".reason.txt").read_text()
        assert "data row has 1 values" in reason or "non-numeric value 'abc'" in reason, reason
    assert sorted(failures["source_sha256"]) == sorted(bad_shas)
    # no input file is gone: every content once, in done/ or rejected/
    done_shas = sorted(sha(p.read_bytes()) for p in done.rglob("*.s1p"))
    assert done_shas == sorted(good_shas)
    assert {str(p.relative_to(done)) for p in done.rglob("*.s1p")} == \
        {name for name, content, _ in files if sha(content) in good_shas}
