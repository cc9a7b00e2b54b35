"""Crash safety of the results store with a real writer process killed by SIGKILL.

A child process (this file run as a script) appends units, in single records and small
batches, plus failed files, and prints ``ack <dut_id>`` / ``fail <source>`` after each
commit returns. The test kills it with SIGKILL at seeded random moments (some during
start-up and crash recovery, most during appends), then checks the pattern of
library-facts §4.3: the store opens, every acknowledged unit is there exactly once and
complete (trace lengths as declared, finite, equal to what was written), no failure is
logged twice, and a rerun completes the set without duplicates.
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

import numpy as np
import pytest

REPO = Path(__file__).resolve().parents[1]
N_UNITS = 30_000
KILLS = 21
MAX_ACKS_PER_RUN = 1000     # with KILLS, well below N_UNITS: no run can finish the lot
FAILURE_EVERY = 97          # every 97th unit id stands for a file that could not be read
SETTINGS = "crash-test-settings"


def unit_sha(i: int) -> str:
    return hashlib.sha256(f"unit-{i}".encode()).hexdigest()


def expected_unit(i: int):
    """The deterministic traces of unit ``i`` (what the writer stores)."""
    n = 51 + (i * 37) % 151
    freq = np.linspace(800e6, 1000e6, n)
    s11 = 0.3 * np.exp(-2j * np.pi * freq * (1e-9 + i * 1e-13))
    return n, freq, s11


def _writer_main(path: str, seed: int) -> None:
    """Child process: store every unit not yet stored, acknowledging each commit."""
    from pipeline.store import ResultsStore, UnitRecord

    rng = random.Random(seed)
    with ResultsStore(path, mode="a") as store:
        print("open", flush=True)
        i = 0
        while i < N_UNITS:
            size = 1 if rng.random() < 0.5 else rng.randint(2, 40)
            batch, failures = [], []
            for j in range(i, min(i + size, N_UNITS)):
                sha = unit_sha(j)
                if j % FAILURE_EVERY == 0:
                    failures.append(j)
                elif not store.contains(sha, SETTINGS):
                    _, freq, s11 = expected_unit(j)
                    batch.append(UnitRecord(
                        dut_id=f"U{j:05d}", lot="crash-lot", source=f"/lot/U{j:05d}.s1p",
                        source_sha256=sha, settings_hash=SETTINGS, freq_hz=freq, s11_raw=s11,
                        s11_dut=s11 * 0.5, s11_matched=s11 * 0.1, elements=[],
                        rl_before_worst_db=float(j % 20), spec_rl_db=10.0))
            i += size
            for record, index in zip(batch, store.append_many(batch)):
                print(f"ack {record.dut_id} {index}", flush=True)
            for j in failures:
                store.append_failure(f"/lot/U{j:05d}.s1p", "", "cannot read file", lot="crash-lot",
                                     settings_hash=SETTINGS)
                print(f"fail /lot/U{j:05d}.s1p", flush=True)
    print("done", flush=True)


def _run_writer(path: Path, seed: int, kill: tuple[str, float] | None):
    """Start the writer and, if ``kill`` is given, SIGKILL it.

    ``("start", t)``: t seconds after starting it (imports, open, crash recovery).
    ``("acks", k)``: as soon as it has acknowledged k more commits, while it goes on
    appending (so the kill lands at a point of the commit cycle that does not depend on
    the speed of the machine). Returns (acked dut ids, logged failures, finished).
    """
    env = dict(os.environ, PYTHONPATH=str(REPO))
    child = subprocess.Popen([sys.executable, __file__, str(path), str(seed)], stdout=subprocess.PIPE,
                             stderr=subprocess.PIPE, text=True, env=env, cwd=REPO)
    lines: list[str] = []
    progress = threading.Condition()

    def read_lines():
        for line in child.stdout:
            with progress:
                lines.append(line)
                progress.notify_all()
        with progress:
            lines.append("eof")
            progress.notify_all()

    reader = threading.Thread(target=read_lines, daemon=True)
    reader.start()
    if kill is None:
        child.wait(timeout=180)
    else:
        moment, amount = kill
        if moment == "start":
            time.sleep(amount)
        else:
            with progress:
                progress.wait_for(lambda: lines[-1:] == ["eof"] or
                                  sum(line.startswith("ack ") for line in lines) >= amount, timeout=60)
        child.send_signal(signal.SIGKILL)
        child.wait()
    reader.join(timeout=10)
    err = child.stderr.read()
    if child.returncode != -signal.SIGKILL:
        assert child.returncode == 0, err
    acked = [line.split()[1] for line in lines if line.startswith("ack ")]
    failed = [line.split()[1] for line in lines if line.startswith("fail ")]
    return acked, failed, any(line.strip() == "done" for line in lines)


def _check_store(path: Path, acked: set[str], failed: set[str], checked: set[str]) -> None:
    """Reopen; every acked unit present once and complete; no duplicate units or failures.

    The traces of units acknowledged since the last check are read with plain h5py
    through the documented layout (index row -> offset and length into /units/traces).
    """
    import h5py

    from pipeline.store import ResultsStore

    with ResultsStore(path, mode="r") as store:
        frame = store.units_frame(latest_only=False)
        failures = store.failures_frame()
    assert not frame["dut_id"].duplicated().any()
    assert not failures["source"].duplicated().any()
    assert failed <= set(failures["source"])
    stored = dict(zip(frame["dut_id"], frame.index))
    missing = acked - stored.keys()
    assert not missing, f"acked but lost: {sorted(missing)[:5]}"
    new = sorted(stored[dut] for dut in acked - checked)
    if not new:
        return
    with h5py.File(path, "r", swmr=True) as f:
        rows = f["units/index"][new[0]:new[-1] + 1]
        first = int(rows["traces_offset"][0])
        traces = f["units/traces"][first:int(rows["traces_offset"][-1] + rows["n_points"][-1])]
    for row in rows[np.asarray(new) - new[0]]:
        dut = row["dut_id"].decode()
        n, freq, s11 = expected_unit(int(dut[1:]))
        assert row["source_sha256"].decode() == unit_sha(int(dut[1:])) and row["n_points"] == n
        points = traces[int(row["traces_offset"]) - first:][:n]
        assert len(points) == n
        assert np.all(np.isfinite(points["s11_dut"]))
        np.testing.assert_array_equal(points["freq_hz"], freq)
        np.testing.assert_array_equal(points["s11_raw"], s11)
        np.testing.assert_array_equal(points["s11_matched"], s11 * 0.1)
    checked |= acked


@pytest.mark.slow
def test_writer_killed_at_random_moments_loses_nothing_acknowledged(tmp_path):
    path = tmp_path / "crash.h5"
    rng = random.Random(20260509)
    acked, failed, checked = set(), set(), set()
    runs_that_committed = 0
    for _ in range(KILLS):
        if rng.random() < 0.25:
            kill = ("start", rng.uniform(0.05, 0.6))
        else:
            kill = ("acks", rng.randint(1, MAX_ACKS_PER_RUN))
        new_acks, new_fails, finished = _run_writer(path, rng.randrange(1 << 30), kill)
        assert not finished
        runs_that_committed += bool(new_acks)
        acked.update(new_acks)
        failed.update(new_fails)
        _check_store(path, acked, failed, checked)
    assert runs_that_committed >= KILLS // 2      # most kills landed in the middle of appends
    new_acks, new_fails, finished = _run_writer(path, rng.randrange(1 << 30), None)
    assert finished
    acked.update(new_acks)
    failed.update(new_fails)
    _check_store(path, acked, failed, checked)
    from pipeline.store import units_frame

    frame = units_frame(path, latest_only=False)
    expected = {f"U{j:05d}" for j in range(N_UNITS) if j % FAILURE_EVERY}
    assert set(frame["dut_id"]) == expected and len(frame) == len(expected)
    assert failed == {f"/lot/U{j:05d}.s1p" for j in range(0, N_UNITS, FAILURE_EVERY)}


if __name__ == "__main__":
    _writer_main(sys.argv[1], int(sys.argv[2]))
