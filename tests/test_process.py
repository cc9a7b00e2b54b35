"""Tests of pipeline.process: many sweeps at once give each unit the record it gets alone.

The units are the sample generator's invented 915 MHz antenna (sample_measurements/
make_samples.py) with unit-to-unit spread, on two frequency grids in one batch; the
fixture is a real chain (port extension, lossy line, a 2-port Touchstone file written
by scikit-rf). The reference for every unit is :func:`process_sweep` on it alone.
"""

from __future__ import annotations

import dataclasses
from pathlib import Path

import numpy as np
import pytest
import skrf
from skrf.media import DefinedGammaZ0

from sample_data import sample_generator

from pipeline.deembed import FixtureChain, FixtureFile, FixtureLine, PortExtension
from pipeline.errors import ConfigError, MatchbayError, MatchError
from pipeline.parts import load_parts
from pipeline.process import Settings, process_sweep, process_sweeps
from pipeline.store import UnitRecord
from pipeline.sweep import Provenance, Sweep

ROOT = Path(__file__).resolve().parents[1]
BAND = (902e6, 928e6)
GRID_A = np.linspace(700e6, 1100e6, 401)
GRID_B = np.linspace(850e6, 1000e6, 151)
CHAIN = FixtureChain(steps=(PortExtension(delay_s=20e-12),
                            FixtureLine(length_m=0.01, z0_ohm=50.0, eps_eff=3.3, loss_db_per_m=5.0,
                                        loss_ref_hz=1e9)), name="test-chain", source="")


SAMPLES = sample_generator()


def unit(freq_hz, i, seed=1):
    """One raw sweep: the Larkspur antenna with its own resonance and resistance, plus noise."""
    rng = np.random.default_rng([seed, i])
    antenna = dataclasses.replace(SAMPLES.LARKSPUR, fs_hz=SAMPLES.LARKSPUR.fs_hz * (1 + rng.normal(0, 0.008)),
                                  r_rad_ohm=SAMPLES.LARKSPUR.r_rad_ohm * (1 + rng.normal(0, 0.04)))
    s11 = SAMPLES.reflection(antenna.impedance(freq_hz)) + SAMPLES.noise(rng, freq_hz.size)
    return Sweep(freq_hz, s11, 50.0, Provenance(dut_id=f"U{i:03d}", source=f"lot/U{i:03d}.s1p",
                                                 source_sha256=f"{i:064x}"))


def settings(fixture=CHAIN):
    return Settings(band_hz=BAND, series="E24", parts=load_parts("generic-0402"), fixture=fixture, lot="t")


def assert_same_record(a: UnitRecord, b: UnitRecord):
    """Every field equal (floats to 1e-9, traces to 1e-12), except the processing time."""
    for field in dataclasses.fields(UnitRecord):
        x, y = getattr(a, field.name), getattr(b, field.name)
        if field.name == "processed_at":
            continue
        if isinstance(x, np.ndarray):
            assert x.shape == y.shape and np.allclose(x, y, rtol=1e-12, atol=0), field.name
        elif isinstance(x, float):
            assert x == pytest.approx(y, abs=1e-9, nan_ok=True), field.name
        elif field.name == "headroom":
            assert x.keys() == y.keys()
            for key in x:
                assert x[key] == (pytest.approx(y[key], rel=1e-9) if isinstance(x[key], float) else y[key]), key
        else:
            assert x == y, field.name


def test_two_grids_in_one_batch_give_each_unit_its_own_record():
    raws = [unit(GRID_A if i % 3 else GRID_B, i) for i in range(14)]        # interleaved grids
    s = settings()
    results = process_sweeps(raws, s)
    assert [r.dut_id for r in results] == [raw.provenance.dut_id for raw in raws]   # input order
    for raw, record in zip(raws, results):
        assert_same_record(record, process_sweep(raw, s))
        dut = CHAIN.apply(raw)                          # the de-embedding, step by step
        assert np.array_equal(record.s11_dut, dut.s11)
        assert record.fixture == list(dut.provenance.fixture)
        assert np.array_equal(record.s11_raw, raw.s11) and np.array_equal(record.freq_hz, raw.freq_hz)
    assert {r.freq_hz.size for r in results} == {GRID_A.size, GRID_B.size}


def test_a_bad_unit_gets_its_error_and_the_others_their_records():
    s = settings()
    raws = [unit(GRID_A, i) for i in range(6)]
    misses = unit(np.linspace(700e6, 880e6, 181), 6)                 # sweep ends below the band
    active = unit(GRID_A, 7)
    z = active.z_ohm
    z[210] = -2 + 5j                                  # not passive at 910 MHz, inside the band
    active = dataclasses.replace(active, s11=(z - 50) / (z + 50))
    batch = raws[:3] + [misses] + raws[3:5] + [active] + raws[5:]
    results = process_sweeps(batch, s)
    assert isinstance(results[3], MatchError) and "not inside the sweep" in str(results[3])
    assert str(results[3]).startswith("lot/U006.s1p: ")
    assert isinstance(results[6], MatchError) and "not positive" in str(results[6])
    assert str(results[6]).startswith("lot/U007.s1p: ")
    good = [r for r in results if not isinstance(r, MatchbayError)]
    assert len(good) == 6
    for raw, record in zip(raws, good):
        assert_same_record(record, process_sweep(raw, s))
    with pytest.raises(MatchError, match="not inside the sweep"):
        process_sweep(misses, s)


def test_a_fixture_that_does_not_cover_one_grid(tmp_path):
    # A 2-port fixture file (a 6 mm, 45 ohm line, written by scikit-rf) over 800-1050 MHz:
    # it covers grid B but not grid A, whose units each get the fixture's error.
    freq = skrf.Frequency.from_f(np.linspace(800e6, 1050e6, 126), unit="Hz")
    media = DefinedGammaZ0(freq, z0_port=50.0, z0=45.0, gamma=1j * freq.w / 2e8)
    path = tmp_path / "launch.s2p"
    media.line(0.006, "m").write_touchstone(str(path))
    chain = FixtureChain(steps=CHAIN.steps + (FixtureFile(str(path)),), name="with-file", source="bench.toml")
    s = settings(chain)
    raws = [unit(GRID_B, 0), unit(GRID_A, 1), unit(GRID_B, 2), unit(GRID_A, 3)]
    results = process_sweeps(raws, s)
    for i in (1, 3):
        assert isinstance(results[i], ConfigError) and "the fixture must cover the sweep" in str(results[i])
        with pytest.raises(ConfigError, match="must cover"):
            process_sweep(raws[i], s)
    for i in (0, 2):
        assert_same_record(results[i], process_sweep(raws[i], s))
        assert results[i].fixture[-1]["type"] == "file" and results[i].fixture[-1]["chain"] == "with-file"


def test_without_fixture_and_with_nothing():
    s = settings(FixtureChain(steps=(), name="none"))
    raws = [unit(GRID_A, i) for i in range(3)]
    for raw, record in zip(raws, process_sweeps(raws, s)):
        assert np.array_equal(record.s11_dut, raw.s11) and record.fixture == []
        assert_same_record(record, process_sweep(raw, s))
    assert process_sweeps([], s) == []
