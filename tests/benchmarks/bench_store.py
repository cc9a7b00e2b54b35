"""Benchmark: the HDF5 results store (targets: append >= 1,000 units/s; units_frame for
100,000 units <= 2 s).

* append rate, 401-point traces: ``append_many`` in batches (the lot path) and one
  ``append`` per unit (the watcher path), each commit flushed before it returns;
* ``units_frame`` over a store of 100,000 units, opened read-only (SWMR) as a report or
  query would; the traces are not read by it, so that store uses 51-point traces to keep
  the file small (about 0.4 GB instead of 2.3 GB);
* opening that store for writing (loading the idempotence keys), ``get_unit`` and
  ``get_units`` on it, and single appends into it.

The units are invented: an antenna-like load with per-unit resonance spread.

    python3 tests/benchmarks/bench_store.py              # prints every figure
    python3 tests/benchmarks/bench_store.py --quick      # 10,000 units for the frame
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from pipeline import metrics  # noqa: E402
from pipeline.store import ResultsStore, UnitRecord, units_frame  # noqa: E402

BAND_HZ = (902e6, 928e6)
TARGET_APPEND_PER_S = 1000
TARGET_FRAME_S = 2.0


def invented_units(n: int, points: int, seed: int = 1, lot: str = "bench-lot") -> list[UnitRecord]:
    """``n`` records of an invented lot: series-RLC antennas with resonance spread."""
    rng = np.random.default_rng(seed)
    freq = np.linspace(800e6, 1000e6, points)
    w = 2 * np.pi * freq
    records = []
    for i in range(n):
        f0 = 915e6 * (1 + 0.01 * rng.standard_normal())
        l_s = 6.0 * 20.0 / (2 * np.pi * f0)
        z = 20.0 + 1j * w * l_s + 1 / (1j * w / ((2 * np.pi * f0) ** 2 * l_s))
        s11 = (z - 50) / (z + 50)
        rl = metrics.return_loss_db(s11)
        records.append(UnitRecord(
            dut_id=f"B{i:06d}", lot=lot, source=f"/bench/{lot}/B{i:06d}.s1p",
            source_sha256=f"{seed:016x}{i:048x}", settings_hash="bench", config={"band_hz": BAND_HZ},
            fixture=[], parts={"name": "ideal"}, series="E24", freq_hz=freq, s11_raw=s11,
            s11_dut=s11, s11_matched=s11 * 0.2,
            elements=[{"position": "shunt", "kind": "capacitor", "value": 3.3e-12},
                      {"position": "series", "kind": "inductor", "value": 1.2e-8}],
            topology="shunt-C, series-L", band_lo_hz=BAND_HZ[0], band_hi_hz=BAND_HZ[1],
            z0_ohm=50.0, spec_rl_db=10.0, rl_before_worst_db=float(rl.min()),
            rl_after_worst_db=float(rl.min()) + 14.0,
            headroom={"q_estimate": 6.0, "rl_bound_db": 25.0, "headroom_db": 3.0}))
    return records


def append_rate(folder: Path, n: int, batch: int, run: int) -> float:
    """Units per second through append_many(batch) (batch=1: one append per unit), into a
    new store."""
    records = invented_units(n, 401, seed=batch)
    path = folder / f"append-{batch}-{run}.h5"
    with ResultsStore(path) as store:
        start = time.perf_counter()
        if batch == 1:
            for record in records:
                store.append(record)
        else:
            for i in range(0, n, batch):
                store.append_many(records[i:i + batch])
        elapsed = time.perf_counter() - start
    assert len(units_frame(path)) == n
    return n / elapsed


def build_large_store(path: Path, n: int) -> None:
    chunk = 10_000
    with ResultsStore(path) as store:
        for first in range(0, n, chunk):
            batch = invented_units(min(chunk, n - first), 51, seed=first + 7)
            for offset, record in enumerate(batch):
                record.dut_id = f"L{first + offset:06d}"
                record.source_sha256 = f"{first + offset:064x}"
            store.append_many(batch)


def main(quick: bool) -> None:
    n_frame = 10_000 if quick else 100_000
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        rates = {batch: [append_rate(folder, 4000, batch, run) for run in range(3)] for batch in (50, 500)}
        rates[1] = [append_rate(folder, 2000, 1, run) for run in range(3)]
        for batch, values in sorted(rates.items()):
            kind = "append() per unit" if batch == 1 else f"append_many, batches of {batch}"
            print(f"{kind:32s}: median {statistics.median(values):7.0f} units/s "
                  f"(runs {', '.join(f'{v:.0f}' for v in values)}; target >= {TARGET_APPEND_PER_S})")

        path = folder / "large.h5"
        start = time.perf_counter()
        build_large_store(path, n_frame)
        print(f"built a {n_frame}-unit store in {time.perf_counter() - start:.1f} s "
              f"({path.stat().st_size / 1e6:.0f} MB)")
        times = []
        for _ in range(5):
            start = time.perf_counter()
            frame = units_frame(path)
            times.append(time.perf_counter() - start)
        assert len(frame) == n_frame
        print(f"units_frame, {n_frame} units        : median {statistics.median(times):.2f} s "
              f"(runs {', '.join(f'{t:.2f}' for t in times)}; target <= {TARGET_FRAME_S} s)")
        start = time.perf_counter()
        with ResultsStore(path) as store:
            opened = time.perf_counter() - start
            start = time.perf_counter()
            for index in range(0, n_frame, n_frame // 200):
                store.get_unit(index)
            per_unit = (time.perf_counter() - start) / 200
            start = time.perf_counter()
            lot = store.get_units(range(n_frame // 2, n_frame // 2 + n_frame // 10))
            bulk = time.perf_counter() - start
            extra = invented_units(1000, 401, seed=12345)
            start = time.perf_counter()
            for record in extra:
                store.append(record)
            into_large = len(extra) / (time.perf_counter() - start)
        print(f"open for writing ({n_frame} units)  : {opened:.2f} s; get_unit (scattered) "
              f"{per_unit * 1e3:.2f} ms; get_units of {len(lot)} neighbours {bulk:.2f} s")
        print(f"append() per unit into that store : {into_large:.0f} units/s (401 points)")


if __name__ == "__main__":
    main(quick="--quick" in sys.argv)
