"""Benchmark: overhead of one live acquisition beyond the sweep itself (target <= 50 ms median).

1601 points, REAL,64, through pyvisa-py over a real loopback socket to the simulated
analyzer (in this process: its server thread shares the two cores with the client, a
pessimistic set-up). Overhead = wall time of ``Analyzer.acquire`` - the simulated sweep time.

    python3 -m pytest tests/benchmarks/bench_acquire_live.py --benchmark-enable
    python3 tests/benchmarks/bench_acquire_live.py      # the table below, with medians

The script also shows what TCP_NODELAY and ';'-joined commands are worth: with Nagle's
algorithm on, each write that is followed by a query waits for a delayed ACK (~40 ms,
library-facts §3.1). The joined generic profile sends every step as one query, so it hardly
cares; the one-command-per-write ASCII profile pays for every write.
"""

from __future__ import annotations

import math
import statistics
import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from instruments import Analyzer, SeriesRLC, SimulatedAnalyzer, load_profile  # noqa: E402

POINTS, START_HZ, STOP_HZ, IFBW_HZ = 1601, 800e6, 1000e6, 100e3
TARGET_MEDIAN_S = 50e-3
LOAD = SeriesRLC(r_ohm=30.0, l_h=53.05e-9, c_f=0.5895e-12)   # resonant near 900 MHz


def overheads(profile_name: str, data_format: str, *, rounds: int, sweep_time_scale: float = 0.0,
              nodelay: bool = True) -> list[float]:
    """Per-acquisition overhead, s, over ``rounds`` acquisitions on one session."""
    profile = load_profile(profile_name)
    with SimulatedAnalyzer(LOAD, sweep_time_scale=sweep_time_scale, noise_db=-math.inf) as sim:
        sweep_s = sim.sweep_time_s(POINTS, IFBW_HZ)
        with Analyzer(sim.resource, profile, timeout_s=5.0) as analyzer:
            analyzer._session.set_nodelay(nodelay)   # a measurement knob, not an option
            analyzer.acquire(START_HZ, STOP_HZ, POINTS, IFBW_HZ, data_format=data_format)   # warm-up
            times = []
            for _ in range(rounds):
                started = time.perf_counter()
                sweep = analyzer.acquire(START_HZ, STOP_HZ, POINTS, IFBW_HZ, data_format=data_format)
                times.append(time.perf_counter() - started - sweep_s)
    assert sweep.s11.size == POINTS and np.all(np.abs(sweep.s11) <= 1)
    return times


def test_bench_acquire_overhead_real64(benchmark):
    profile = load_profile("generic-scpi")
    with SimulatedAnalyzer(LOAD, sweep_time_scale=0.0, noise_db=-math.inf) as sim:
        with Analyzer(sim.resource, profile, timeout_s=5.0) as analyzer:
            result = benchmark.pedantic(analyzer.acquire, args=(START_HZ, STOP_HZ, POINTS, IFBW_HZ),
                                        kwargs={"data_format": "REAL,64"}, rounds=100, warmup_rounds=5)
    assert result.s11.size == POINTS
    if benchmark.stats is not None and not benchmark.disabled:
        assert benchmark.stats.stats.median <= TARGET_MEDIAN_S


def main() -> int:
    rows = [
        ("generic-scpi, REAL,64, instant sweep", "generic-scpi", "REAL,64", 0.0, True, 200),
        ("generic-scpi, REAL,64, real sweep time (26.0 ms)", "generic-scpi", "REAL,64", 1.0, True, 50),
        ("generic-scpi, REAL,32, instant sweep", "generic-scpi", "REAL,32", 0.0, True, 100),
        ("generic-scpi, ASCII, instant sweep", "generic-scpi", "ASCII", 0.0, True, 100),
        ("generic-scpi, REAL,64, Nagle on", "generic-scpi", "REAL,64", 0.0, False, 50),
        ("generic-scpi-ascii (one command per write)", "generic-scpi-ascii", "ASCII", 0.0, True, 50),
        ("generic-scpi-ascii, Nagle on", "generic-scpi-ascii", "ASCII", 0.0, False, 10),
    ]
    print(f"overhead per acquisition beyond the sweep, {POINTS} points (median, p90 over N runs)")
    verdict = 0
    for label, name, fmt, scale, nodelay, rounds in rows:
        times = overheads(name, fmt, rounds=rounds, sweep_time_scale=scale, nodelay=nodelay)
        median, p90 = statistics.median(times), float(np.percentile(times, 90))
        print(f"  {label:50s} {median * 1e3:8.2f} ms  {p90 * 1e3:8.2f} ms  N={rounds}")
        if name == "generic-scpi" and fmt == "REAL,64" and nodelay and median > TARGET_MEDIAN_S:
            verdict = 1
    print(f"target: median <= {TARGET_MEDIAN_S * 1e3:.0f} ms for REAL,64 -> {'FAIL' if verdict else 'ok'}")
    return verdict


if __name__ == "__main__":
    sys.exit(main())
