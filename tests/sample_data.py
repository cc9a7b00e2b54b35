"""Invented test data shared by the tests and the benchmarks.

* :func:`sample_generator`: sample_measurements/make_samples.py loaded as a module, for
  its antenna model and writers (it is a script, not part of the package).
* :func:`antenna_files`: distinct 401-point .s1p files (bytes) of a series-RLC antenna
  near 915 MHz, written by scikit-rf.

Benchmarks under tests/benchmarks/ put this folder on ``sys.path`` to import it.
"""

from __future__ import annotations

import functools
import importlib.util
import os
import sys
import tempfile
from pathlib import Path

import numpy as np

REPO = Path(__file__).resolve().parents[1]
POINTS = 401


@functools.cache
def sample_generator():
    """The sample generator script as a module (loaded once)."""
    spec = importlib.util.spec_from_file_location("make_samples", REPO / "sample_measurements" / "make_samples.py")
    module = importlib.util.module_from_spec(spec)
    sys.modules["make_samples"] = module          # dataclasses look their module up
    spec.loader.exec_module(module)
    return module


def antenna_files(n: int, seed: int = 0) -> list[bytes]:
    """``n`` distinct 401-point .s1p files (bytes) of a series-RLC antenna near 915 MHz.

    Z = R + jwL + 1/(jwC), R ~ 20 ohm, L ~ 30 nH, C resonating near 915 MHz, each with a
    seeded spread; written by scikit-rf (RI format) so the files are what a real tool writes.
    """
    import skrf

    rng = np.random.default_rng(seed)
    freq = skrf.Frequency.from_f(np.linspace(800e6, 1000e6, POINTS), unit="Hz")
    w = 2 * np.pi * freq.f
    contents = []
    with tempfile.TemporaryDirectory() as tmp:
        for i in range(n):
            r = 20.0 * (1 + 0.1 * rng.standard_normal())
            l_h = 30e-9 * (1 + 0.05 * rng.standard_normal())
            c_f = 1 / ((2 * np.pi * 915e6) ** 2 * l_h) * (1 + 0.05 * rng.standard_normal())
            z = r + 1j * w * l_h + 1 / (1j * w * c_f)
            s11 = (z - 50) / (z + 50)
            net = skrf.Network(frequency=freq, s=s11.reshape(-1, 1, 1), z0=50, name=f"u{i}")
            net.write_touchstone(os.path.join(tmp, f"u{i}"), form="ri")
            contents.append(Path(tmp, f"u{i}.s1p").read_bytes())
    return contents
