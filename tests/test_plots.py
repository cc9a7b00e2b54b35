"""The match figure: the Smith-chart path of the parts, the network in words, the PNG."""

from __future__ import annotations

import struct
from pathlib import Path

import numpy as np
import pytest

from pipeline.elements import Element, PartModel
from pipeline.match import match_at, predicted_gamma
from pipeline.plots import DPI, FIG_SIZE_IN, match_path, network_text, plot_match


def png_size(path: Path) -> tuple[int, int]:
    """(width, height) from the PNG IHDR chunk."""
    header = path.read_bytes()[:24]
    assert header[:8] == b"\x89PNG\r\n\x1a\n"
    return struct.unpack(">II", header[16:24])


# Pozar, Microwave Engineering 4th ed., Example 5.1 (from memory; exact values recomputed in
# references.json LNET-POZAR51-*): Z_L = 200 - j100 ohm, Z0 = 100 ohm, 500 MHz; solution 1 is
# a shunt C of 0.92277 pF across the load and a series L of 38.985 nH toward the source.
POZAR_ZL, POZAR_Z0, POZAR_F = 200 - 100j, 100.0, 500e6
POZAR_SOLUTION_1 = (Element("series", "inductor", 38.985e-9), Element("shunt", "capacitor", 0.92277e-12))


def test_pozar_example_path_ends_at_the_centre():
    paths = match_path(POZAR_SOLUTION_1, POZAR_ZL, POZAR_F, POZAR_Z0)
    assert len(paths) == 2
    assert paths[0][0] == pytest.approx((POZAR_ZL - POZAR_Z0) / (POZAR_ZL + POZAR_Z0), abs=1e-12)
    assert abs(paths[-1][-1]) < 1e-3        # 5-digit values: |Gamma| ~ 1e-4, RL ~ 80 dB


@pytest.mark.parametrize("z_load", [200 - 100j, 15 - 14j, 30 + 40j, 80 + 5j])
def test_path_end_is_the_predicted_match(z_load):
    """The last point of the path equals Gamma_in of the network at that frequency."""
    for solution in match_at(z_load, 915e6, 50.0):
        paths = match_path(solution.elements, z_load, 915e6, 50.0)
        expected = predicted_gamma(solution.elements, [915e6], [z_load], 50.0)[0]
        assert paths[-1][-1] == pytest.approx(expected, abs=1e-12)
        assert abs(paths[-1][-1]) < 1e-9


def test_series_moves_on_constant_resistance_shunt_on_constant_conductance():
    z0, f = 50.0, 915e6
    elements = (Element("shunt", "capacitor", 5.25e-12), Element("series", "inductor", 6.38e-9))
    series_path, shunt_path = match_path(elements, 15 - 14j, f, z0)   # load side applied first
    z_series = z0 * (1 + series_path) / (1 - series_path)
    z_shunt = z0 * (1 + shunt_path) / (1 - shunt_path)
    np.testing.assert_allclose(z_series.real, 15.0, rtol=1e-9)
    np.testing.assert_allclose((1 / z_shunt).real, (1 / z_shunt[0]).real, rtol=1e-9)
    assert np.ptp(z_series.imag) > 10 and np.ptp((1 / z_shunt).imag) > 0.01   # they do move


def test_series_capacitor_path_starts_at_the_previous_point():
    """Sweeping a series C's reactance from 0 keeps the path continuous (C = 0 would be open)."""
    paths = match_path((Element("series", "capacitor", 2e-12),), 30 + 60j, 1e9, 50.0)
    assert paths[0][0] == pytest.approx((30 + 60j - 50) / (30 + 60j + 50), abs=1e-12)
    assert np.all(np.isfinite(paths[0]))


def test_lossy_part_path_still_ends_at_the_prediction():
    lossy = (Element("shunt", "capacitor", 4.7e-12, PartModel(esr_ohm=0.4, srf_hz=6e9)),
             Element("series", "inductor", 6.8e-9, PartModel(q=30, q_ref_hz=1e9, srf_hz=4e9)))
    paths = match_path(lossy, 15 - 14j, 915e6, 50.0)
    assert paths[-1][-1] == pytest.approx(predicted_gamma(lossy, [915e6], [15 - 14j], 50.0)[0], abs=1e-12)


def test_no_network_means_no_path():
    assert match_path((), 50 + 0j, 1e9, 50.0) == []


def test_network_text_runs_from_radio_to_antenna():
    elements = (Element("shunt", "capacitor", 3.3e-12), Element("series", "inductor", 12e-9))
    assert network_text(elements) == "radio ─ shunt 3.3 pF ─ series 12 nH ─ antenna"
    assert network_text(()) == "radio ─ antenna"


def _sweep(f0=915e6):
    f = np.linspace(700e6, 1.1e9, 401)
    w, ws = 2 * np.pi * f, 2 * np.pi * f0
    z = 18 + 1j * (w * 30e-9 - 1 / (w * (1 / (ws ** 2 * 30e-9))))
    return f, (z - 50) / (z + 50), z


@pytest.mark.parametrize("band", [(902e6, 928e6), (915e6, 915e6)])
def test_plot_is_written_with_the_expected_size(tmp_path, band):
    f, s11, z = _sweep()
    center = 0.5 * (band[0] + band[1])
    z_c = complex(np.interp(center, f, z.real), np.interp(center, f, z.imag))
    elements = match_at(z_c, center, 50.0)[0].elements
    after = predicted_gamma(elements, f, z, 50.0)
    out = plot_match(tmp_path / "m.png", f, s11, after, band, 50.0, elements, title="unit 1",
                     spec_rl_db=10.0, rl_bound_db=20.0)
    assert out == tmp_path / "m.png"
    assert out.stat().st_size > 20_000
    assert png_size(out) == (round(FIG_SIZE_IN[0] * DPI), round(FIG_SIZE_IN[1] * DPI))
    assert [p.name for p in tmp_path.iterdir()] == ["m.png"]        # no temporary left


def test_plot_of_a_load_needing_no_network(tmp_path):
    f = np.linspace(2.2e9, 2.7e9, 51)
    s11 = np.full(f.shape, 0.01 + 0.0j)
    out = plot_match(tmp_path / "flat.png", f, s11, s11, (2.4e9, 2.5e9), 50.0, ())
    assert png_size(out) == (round(FIG_SIZE_IN[0] * DPI), round(FIG_SIZE_IN[1] * DPI))


def test_unwritable_plot_raises_and_leaves_nothing(tmp_path):
    f, s11, _ = _sweep()
    with pytest.raises(OSError):
        plot_match(tmp_path / "no-such-folder" / "m.png", f, s11, s11, (902e6, 928e6), 50.0, ())
    assert list(tmp_path.iterdir()) == []
