"""Benchmark: a 2,000-unit lot end to end, against merely reading the same files.

    python3 tests/benchmarks/bench_lot_pipeline.py [UNITS] [WORKERS]

Writes UNITS (default 2000) invented 915 MHz antennas of 401 points into a temporary
folder (the sample generator's model, seeded), then times in the same run:
  1. reading every file with ``skrf.Network`` (read-only throughput, one process);
  2. the lot pipeline: ingest -> de-embed (a 3-step chain) -> per-unit E24 band match
     with finite-Q parts -> store, on WORKERS processes (default: all cores);
  3. the lot analysis (shared network and tolerance Monte Carlo) on the stored lot.
Prints units per second for 1 and 2 and their ratio (goal: >= 0.5).
"""

from __future__ import annotations

import os
import sys
import tempfile
import time
from dataclasses import replace
from pathlib import Path

import numpy as np
import skrf

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))        # this checkout's pipeline, not whichever one is installed
sys.path.insert(0, str(ROOT / "tests"))

from sample_data import sample_generator  # noqa: E402


def write_lot(folder: Path, units: int, seed: int = 7) -> list[str]:
    """UNITS one-port files of the Larkspur model with unit-to-unit spread."""
    ms = sample_generator()
    rng = np.random.default_rng(seed)
    freq = ms.frequency(700e6, 1.1e9, 401)
    paths = []
    for i in range(units):
        unit = replace(ms.LARKSPUR, fs_hz=ms.LARKSPUR.fs_hz * (1 + rng.normal(0, 0.008)),
                       r_rad_ohm=ms.LARKSPUR.r_rad_ohm * (1 + rng.normal(0, 0.04)))
        s11 = ms.reflection(unit.impedance(freq.f)) + ms.noise(rng, freq.npoints)
        paths.append(str(ms.write(ms.one_port(freq, s11, "benchmark unit"), folder / f"U{i:05d}.s1p")))
    return paths


def main(units: int = 2000, workers: int | None = None) -> None:
    from pipeline.deembed import FixtureChain, FixtureLine, PortExtension
    from pipeline.lotjob import analyse_lot, process_lot
    from pipeline.parts import load_parts
    from pipeline.process import Settings
    from pipeline.store import ResultsStore

    workers = workers or os.cpu_count()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp) / "lot"
        folder.mkdir()
        paths = write_lot(folder, units)

        start = time.perf_counter()
        for path in paths:
            skrf.Network(path)
        read_s = time.perf_counter() - start

        chain = FixtureChain(steps=(
            PortExtension(delay_s=20e-12),
            FixtureLine(length_m=0.01, z0_ohm=50.0, eps_eff=3.3, loss_db_per_m=5.0, loss_ref_hz=1e9),
            PortExtension(delay_s=5e-12, loss_db_dc=0.02),
        ), name="bench-chain", source="benchmark")
        settings = Settings(band_hz=(902e6, 928e6), series="E24", parts=load_parts("generic-0402"),
                            fixture=chain, lot="bench")
        start = time.perf_counter()
        with ResultsStore(Path(tmp) / "bench.h5", mode="a") as store:
            counts = process_lot(store, paths, settings, workers=workers)
            pipeline_s = time.perf_counter() - start
            start = time.perf_counter()
            summary = analyse_lot(store, "bench", settings)
            analyse_s = time.perf_counter() - start

    read_rate, pipe_rate = units / read_s, units / pipeline_s
    print(f"units: {units} x 401 points, workers: {workers}, stored {counts['stored']}, failed {counts['failed']}")
    print(f"read only (skrf.Network, 1 process): {read_s:6.2f} s  {read_rate:7.1f} units/s")
    print(f"pipeline (ingest, de-embed, E24 finite-Q band match, store): {pipeline_s:6.2f} s  "
          f"{pipe_rate:7.1f} units/s")
    print(f"ratio pipeline / read-only: {pipe_rate / read_rate:.2f}  (goal >= 0.5)")
    print(f"lot analysis (shared network + {summary['tolerance']['n_trials']}-trial Monte Carlo): "
          f"{analyse_s:6.2f} s; shared yield {summary['shared']['yield_fraction']:.3f}")


if __name__ == "__main__":
    args = [int(a) for a in sys.argv[1:]]
    main(*args)
