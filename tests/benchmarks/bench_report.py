"""Benchmark: the HTML report of a 2,000-unit lot (target <= 30 s).

    python3 tests/benchmarks/bench_report.py [UNITS] [--store PATH]

Builds the lot once with the real pipeline: UNITS (default 2000) invented 915 MHz
antennas of 401 points (tests/test_report.py's seeded model, 2 % of them detuned so that
they miss the shared network), ``process_lot`` on all cores, then ``analyse_lot`` (shared
network, 2000-trial tolerance Monte Carlo). With ``--store PATH`` the store is kept there
and reused by later runs. Then times ``write_report`` with its defaults (every unit in the
table and the lot figures, plots for the 40 lowest-RL units, drawn on all cores), the
way ``matchbay report STORE -o DIR`` runs it, and prints the wall time and the file size.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path[:0] = [str(ROOT), str(ROOT / "tests")]

TARGET_S = 30.0
LOT = "bench-2000"


def build_store(path: Path, units: int) -> None:
    """Write the lot's files into a temporary folder and run the lot job into ``path``."""
    from pipeline.lotjob import analyse_lot, process_lot
    from pipeline.process import Settings
    from pipeline.store import ResultsStore
    from test_report import BAND, SPEC_DB, write_lot

    names = [f"B{i:05d}" for i in range(units)]
    detuned = {name: (0.94 if i % 2 else 1.055) for i, name in enumerate(names[::50])}
    settings = Settings(band_hz=BAND, spec_rl_db=SPEC_DB, series="E24", lot=LOT)
    with tempfile.TemporaryDirectory() as tmp:
        start = time.perf_counter()
        paths = write_lot(Path(tmp), names, seed=5, detuned=detuned)
        with ResultsStore(path, mode="a") as store:
            counts = process_lot(store, paths, settings)
            analyse_lot(store, LOT, settings)
    print(f"built the store ({counts['stored']} units) in {time.perf_counter() - start:.0f} s: {path}")


def time_report(store: Path) -> float:
    from pipeline.report import write_report

    with tempfile.TemporaryDirectory() as out:
        start = time.perf_counter()
        report = write_report(store, out)
        elapsed = time.perf_counter() - start
        size_mb = report.stat().st_size / 1e6
    print(f"report of the {LOT} lot: {elapsed:.1f} s, {size_mb:.1f} MB "
          f"(target <= {TARGET_S:.0f} s: {'met' if elapsed <= TARGET_S else 'MISSED'})")
    return elapsed


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("units", nargs="?", type=int, default=2000)
    parser.add_argument("--store", type=Path, help="keep (and reuse) the lot's store here")
    args = parser.parse_args()
    if args.store is not None:
        if not args.store.exists():
            build_store(args.store, args.units)
        time_report(args.store)
        return
    with tempfile.TemporaryDirectory() as tmp:
        store = Path(tmp) / "bench.h5"
        build_store(store, args.units)
        time_report(store)


if __name__ == "__main__":
    main()
