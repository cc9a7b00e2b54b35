"""Benchmark: the shared network of a 2,000-unit lot (target <= 10 s) and its Monte Carlo.

The lot is invented: 915 MHz ISM-band PCB antennas (series R-L-C behind a pad capacitance,
resonance, resistance and Q spread from unit to unit, 2 % of the units detuned), each swept
with 401 points across the band 902-928 MHz, so every unit is scored on 401 frequencies.
The shared search includes computing the per-unit optima it starts from (32 units + the
lot mean), with E24 values, ideal parts and finite-Q parts (configs/parts/generic-0402).

    python3 tests/benchmarks/bench_lot.py                  # prints the seconds
    python3 -m pytest tests/benchmarks/bench_lot.py --benchmark-enable
"""

from __future__ import annotations

import sys
import time
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from pipeline.lot import common_band_grid, shared_network, tolerance_yield  # noqa: E402
from pipeline.parts import load_parts  # noqa: E402

UNITS = 2000
POINTS = 401
BAND = (902e6, 928e6)
SPEC_RL_DB = 10.0
MC_TRIALS = 2000
TARGET_SHARED_S = 10.0


def invented_lot(seed: int = 2024):
    """(unit_id, freq_hz, s11) for UNITS invented antennas swept over the band."""
    rng = np.random.default_rng(seed)
    f = np.linspace(*BAND, POINTS)
    fs = 935e6 * (1 + rng.normal(0, 0.010, UNITS))
    detuned = rng.random(UNITS) < 0.02
    fs[detuned] *= 1 + rng.choice([-1, 1], detuned.sum()) * rng.uniform(0.04, 0.07, detuned.sum())
    r = 18.0 * (1 + rng.normal(0, 0.08, UNITS))
    q = 10.0 * (1 + rng.normal(0, 0.05, UNITS))
    w = 2 * np.pi * f
    units = []
    for i in range(UNITS):
        ws = 2 * np.pi * fs[i]
        inductance = q[i] * r[i] / ws
        z = r[i] + 1j * w * inductance + 1 / (1j * w / (ws ** 2 * inductance))
        z = 1 / (1 / z + 1j * w * 0.6e-12)
        units.append((f"BN-{i + 1:05d}", f, (z - 50) / (z + 50)))
    return units


def _timed(function, *args, **kwargs):
    start = time.perf_counter()
    result = function(*args, **kwargs)
    return result, time.perf_counter() - start


def test_bench_shared_network_2000_units(benchmark):
    lot = common_band_grid(invented_lot(), BAND)
    result = benchmark.pedantic(shared_network, args=(lot, SPEC_RL_DB), rounds=1, iterations=1)
    assert result.n_units == UNITS and lot.freq_hz.size == POINTS
    if benchmark.stats is not None and not benchmark.disabled:
        assert benchmark.stats.stats.max <= TARGET_SHARED_S


def test_bench_monte_carlo_2000_trials(benchmark):
    lot = common_band_grid(invented_lot(), BAND)
    parts = load_parts("generic-0402")
    shared = shared_network(lot, SPEC_RL_DB, parts=parts)
    result = benchmark.pedantic(tolerance_yield, args=(lot, shared.elements, SPEC_RL_DB, parts),
                                kwargs={"n_trials": MC_TRIALS}, rounds=3, iterations=1)
    assert result.n_trials == MC_TRIALS


def main() -> None:
    units = invented_lot()
    lot, t_grid = _timed(common_band_grid, units, BAND)
    print(f"lot: {UNITS} units x {lot.freq_hz.size} points, band 902-928 MHz, spec {SPEC_RL_DB} dB")
    print(f"common_band_grid: {t_grid:.2f} s")
    for label, parts in (("ideal parts", None), ("finite-Q generic-0402", load_parts("generic-0402"))):
        shared, t_shared = _timed(shared_network, lot, SPEC_RL_DB, parts=parts)
        mc, t_mc = _timed(tolerance_yield, lot, shared.elements, SPEC_RL_DB, parts, n_trials=MC_TRIALS)
        values = ", ".join(f"{e.position}-{e.kind} {e.value:.3g}" for e in shared.elements)
        print(f"{label}: shared_network {t_shared:.2f} s (target <= {TARGET_SHARED_S:.0f} s): "
              f"{values}; yield {shared.yield_fraction:.4f}, median worst RL "
              f"{shared.median_worst_rl_db:.2f} dB; candidates per topology "
              f"{[t.n_candidates for t in shared.per_topology]}")
        print(f"{label}: tolerance_yield {MC_TRIALS} trials {t_mc:.2f} s: yield "
              f"{mc.yield_fraction:.4f} [{mc.ci_low:.4f}, {mc.ci_high:.4f}] (Wilson 95 %)")


if __name__ == "__main__":
    main()
