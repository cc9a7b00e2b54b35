"""Benchmark of `matchbay watch`: per-file cost, latency close -> commit, sustained throughput.

Targets (default settings, 401-point sweeps, 2 cores): median latency from a file's close to
its record committed <= 1 s; sustained throughput >= 50 files/s.

* cost     : one file in this process, step by step (hash, process_file, store append, move).
* latency  : a real `matchbay watch` subprocess; files are written one at a time, 0.3 s apart;
             the latency is from the writer's close() to the file's appearance in done/ (the
             move follows the commit, so this is an upper bound of close -> commit).
             Measured for a local write+close (inotify close event), for a file renamed in
             from outside the folder (only "created": the stability window decides), and with
             the polling observer (network-share mode, default poll interval).
* throughput: N files written into the folder as fast as the writer can, while the watcher
             runs; files/s from the first write to the last file in done/. Also `--once` on a
             backlog of N files (startup included and excluded). On a shared machine the wall
             figures depend on the other load, so the CPU time of the watcher and its workers
             per file is printed too, with the rate it allows on two otherwise idle cores.

    python3 tests/benchmarks/bench_watch.py                 # all, N = 1000
    python3 tests/benchmarks/bench_watch.py --files 500 --only throughput
"""

from __future__ import annotations

import argparse
import hashlib
import os
import resource
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(REPO))
sys.path.insert(0, str(REPO / "tests"))

from sample_data import antenna_files  # noqa: E402

BAND = "902M:928M"
POINTS = 401
CLI = "import sys; from pipeline.cli import main; sys.exit(main(sys.argv[1:]))"


class Watcher:
    """`matchbay watch FOLDER --store STORE --band BAND [extra]` as a subprocess."""

    def __init__(self, folder: Path, store: Path, *extra: str):
        self.log = folder.parent / f"watch-{time.monotonic_ns()}.log"
        self._err = open(self.log, "w")
        self.proc = subprocess.Popen([sys.executable, "-c", CLI, "watch", str(folder), "--store", str(store),
                                      "--band", BAND, *extra], cwd=REPO, stdout=subprocess.PIPE,
                                     stderr=self._err, text=True)
        self.started_at = time.monotonic()

    def wait_started(self) -> float:
        while "INFO watching " not in self.log.read_text():
            if self.proc.poll() is not None:
                raise RuntimeError(self.log.read_text())
            time.sleep(0.02)
        return time.monotonic() - self.started_at

    def stop(self, *, wait_for_exit: bool = False) -> str:
        """SIGTERM (or, with ``wait_for_exit``, let it end by itself); its summary line."""
        if self.proc.poll() is None and not wait_for_exit:
            self.proc.terminate()
        out, _ = self.proc.communicate(timeout=600)
        self._err.close()
        return out.strip()


def count_done(done: Path) -> int:
    try:
        return sum(1 for _ in os.scandir(done))
    except FileNotFoundError:
        return 0


def wait_for(path: Path, timeout_s: float = 30.0) -> float:
    deadline = time.monotonic() + timeout_s
    while not path.exists():
        if time.monotonic() > deadline:
            raise TimeoutError(path)
        time.sleep(0.001)
    return time.monotonic()


def bench_cost(sweeps: list[bytes], root: Path) -> None:
    from pipeline.acquire import sha256_file
    from pipeline.process import Settings, process_file
    from pipeline.store import ResultsStore
    from pipeline.watch import destination, move_file

    folder = root / "cost"
    folder.mkdir()
    paths = []
    for i, content in enumerate(sweeps[:200]):
        paths.append(folder / f"unit{i:04d}.s1p")
        paths[-1].write_bytes(content)
    settings = Settings(band_hz=(902e6, 928e6))
    process_file(paths[0], settings)                                    # warm-up (imports)
    steps = {"sha256": [], "process_file": [], "store append": [], "move": []}
    with ResultsStore(root / "cost.h5", mode="a") as store:
        for p in paths:
            t0 = time.perf_counter()
            sha256_file(p)
            t1 = time.perf_counter()
            record = process_file(p, settings)
            t2 = time.perf_counter()
            store.append(record)
            t3 = time.perf_counter()
            move_file(p, destination(p, folder, root / "cost-done"))
            t4 = time.perf_counter()
            for name, dt in zip(steps, (t1 - t0, t2 - t1, t3 - t2, t4 - t3)):
                steps[name].append(dt * 1e3)
    print(f"per-file cost, {len(paths)} files, one process (median ms):")
    for name, values in steps.items():
        print(f"  {name:13s} {statistics.median(values):7.2f}")
    total = sum(statistics.median(v) for v in steps.values())
    print(f"  {'total':13s} {total:7.2f}  -> {1e3 / total:.0f} files/s per core")


def bench_latency(sweeps: list[bytes], root: Path, *, mode: str, count: int = 40) -> list[float]:
    folder, outside = root / f"latency-{mode}", root / f"outside-{mode}"
    folder.mkdir()
    outside.mkdir()
    extra = ("--polling",) if mode == "polling" else ()
    watcher = Watcher(folder, root / f"latency-{mode}.h5", *extra)
    watcher.wait_started()
    time.sleep(1.0)
    latencies = []
    try:
        for i, content in enumerate(sweeps[:count]):
            name = f"unit{i:04d}.s1p"
            if mode == "rename":
                (outside / name).write_bytes(content)
                os.replace(outside / name, folder / name)
            else:
                with open(folder / name, "wb") as fh:
                    fh.write(content)
            closed = time.monotonic()
            latencies.append(wait_for(folder / "done" / name) - closed)
            time.sleep(0.3)
    finally:
        watcher.stop()
    ms = np.array(latencies) * 1e3
    print(f"latency close -> in done/ ({mode}, {count} files): median {np.median(ms):.0f} ms, "
          f"p90 {np.percentile(ms, 90):.0f} ms, max {ms.max():.0f} ms")
    return latencies


def children_cpu_s() -> float:
    """CPU seconds of finished child processes and their waited-for children (the workers)."""
    usage = resource.getrusage(resource.RUSAGE_CHILDREN)
    return usage.ru_utime + usage.ru_stime


def cpu_line(cpu_s: float, files: int) -> str:
    per_file_ms = cpu_s / files * 1e3
    return (f"CPU {per_file_ms:.1f} ms/file (watcher + workers) -> "
            f"{2000 / per_file_ms:.0f} files/s on 2 idle cores")


def bench_throughput(sweeps: list[bytes], root: Path) -> None:
    folder = root / "throughput"
    folder.mkdir()
    cpu_before = children_cpu_s()
    watcher = Watcher(folder, root / "throughput.h5")
    watcher.wait_started()
    time.sleep(1.0)
    start = time.monotonic()
    for i, content in enumerate(sweeps):
        with open(folder / f"unit{i:04d}.s1p", "wb") as fh:
            fh.write(content)
    written = time.monotonic()
    done = folder / "done"
    while count_done(done) < len(sweeps):
        time.sleep(0.05)
    end = time.monotonic()
    summary = watcher.stop()
    print(f"sustained ({len(sweeps)} files written in {written - start:.2f} s while watching): "
          f"{len(sweeps) / (end - start):.1f} files/s  [{summary}]; "
          f"{cpu_line(children_cpu_s() - cpu_before, len(sweeps))} (startup included)")


def bench_once(sweeps: list[bytes], root: Path) -> None:
    folder = root / "once"
    folder.mkdir()
    for i, content in enumerate(sweeps):
        (folder / f"unit{i:04d}.s1p").write_bytes(content)
    cpu_before = children_cpu_s()
    watcher = Watcher(folder, root / "once.h5", "--once")
    startup = watcher.wait_started()
    summary = watcher.stop(wait_for_exit=True)
    total = time.monotonic() - watcher.started_at
    print(f"--once backlog of {len(sweeps)}: {total:.1f} s in all ({len(sweeps) / total:.1f} files/s), "
          f"{total - startup:.1f} s after startup ({len(sweeps) / (total - startup):.1f} files/s)"
          f"  [{summary}]; "
          f"{cpu_line(children_cpu_s() - cpu_before, len(sweeps))} (startup included)")
    print(f"load average now: {' '.join(f'{x:.1f}' for x in os.getloadavg())}")


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--files", type=int, default=1000)
    parser.add_argument("--only", choices=["cost", "latency", "throughput", "once"])
    args = parser.parse_args(argv)
    print(f"python {sys.version.split()[0]}, {os.cpu_count()} cores; generating {args.files} sweeps...")
    sweeps = antenna_files(args.files, seed=5)
    assert len({hashlib.sha256(s).hexdigest() for s in sweeps}) == len(sweeps)
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        if args.only in (None, "cost"):
            bench_cost(sweeps, root)
        if args.only in (None, "latency"):
            for mode in ("close", "rename", "polling"):
                bench_latency(sweeps, root, mode=mode)
        if args.only in (None, "throughput"):
            bench_throughput(sweeps, root)
        if args.only in (None, "once"):
            bench_once(sweeps, root)
    return 0


if __name__ == "__main__":
    sys.exit(main())
