"""Benchmark: reading one 1601-point Touchstone file into a Sweep (target about 3 ms median).

Cases: a v1 .s1p (RI, full precision as scikit-rf writes it, ~80 KB), the same data as a
v2 .ts, and a v1 .s2p read at port 2 with renormalisation from 75 ohm. The baseline is
scikit-rf's own ``Network(path)``, which does none of the checks.

    python3 -m pytest tests/benchmarks/bench_acquire.py --benchmark-enable
    python3 tests/benchmarks/bench_acquire.py            # plain timeit, prints the medians
"""

from __future__ import annotations

import statistics
import sys
import tempfile
import timeit
from pathlib import Path

import numpy as np
import pytest

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from pipeline.acquire import read_sweep  # noqa: E402

POINTS = 1601
TARGET_MEDIAN_S = 3e-3


def write_files(folder: Path) -> dict[str, tuple[Path, dict]]:
    """The benchmark files, written with scikit-rf; name -> (path, read_sweep options)."""
    import skrf

    freq = skrf.Frequency.from_f(np.linspace(700e6, 1.1e9, POINTS), unit="Hz")
    rng = np.random.default_rng(0)
    s11 = 0.6 * np.exp(1j * rng.uniform(-np.pi, np.pi, POINTS))
    one_port = skrf.Network(frequency=freq, s=s11.reshape(-1, 1, 1), z0=50)
    one_port.write_touchstone(str(folder / "unit.s1p"))
    one_port.write_touchstone(str(folder / "unit.ts"), version="2.0")
    s = np.zeros((POINTS, 2, 2), dtype=complex)
    s[:, 0, 0], s[:, 1, 1], s[:, 0, 1], s[:, 1, 0] = 0.2, s11, 0.05, 0.05
    skrf.Network(frequency=freq, s=s, z0=75).write_touchstone(str(folder / "pair.s2p"))
    return {"v1_s1p": (folder / "unit.s1p", {}), "v2_ts": (folder / "unit.ts", {}),
            "v1_s2p_port2_renormalised": (folder / "pair.s2p", {"port": 2, "z0": 50.0})}


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    return write_files(tmp_path_factory.mktemp("bench"))


@pytest.mark.parametrize("case", ["v1_s1p", "v2_ts", "v1_s2p_port2_renormalised"])
def test_read_sweep(benchmark, files, case):
    path, options = files[case]
    sweep = benchmark(read_sweep, path, **options)
    assert sweep.freq_hz.size == POINTS


def test_scikit_rf_baseline(benchmark, files):
    import skrf

    network = benchmark(skrf.Network, str(files["v1_s1p"][0]))
    assert network.f.size == POINTS


def _median_s(call, repeat: int = 200) -> float:
    return statistics.median(timeit.repeat(call, number=1, repeat=repeat))


def main() -> None:
    import skrf

    with tempfile.TemporaryDirectory() as folder:
        cases = write_files(Path(folder))
        read_sweep(cases["v1_s1p"][0])                      # warm up imports and page cache
        for name, (path, options) in cases.items():
            print(f"read_sweep {name:28s} median {1e3 * _median_s(lambda: read_sweep(path, **options)):.2f} ms")
        baseline = _median_s(lambda: skrf.Network(str(cases["v1_s1p"][0])))
        print(f"skrf.Network v1_s1p (no checks)      median {1e3 * baseline:.2f} ms")
        print(f"target: about {1e3 * TARGET_MEDIAN_S:.0f} ms per 1601-point file")


if __name__ == "__main__":
    main()
