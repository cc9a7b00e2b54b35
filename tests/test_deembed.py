"""De-embedding stage: port extension, fixture line, fixture file, chains, fitting, CLI.

Independent checks: every "measured" sweep here is built with scikit-rf cascades
(media lines, lumped elements, ``**``) and every removal is compared with the device
before embedding, or with scikit-rf's ``fixture.inv ** measured``. Reference values name
their case in /work/shared/reference (REFERENCES.md section 5).
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
import skrf
from hypothesis import given, settings
from hypothesis import strategies as st
from skrf.media import DefinedGammaZ0

from pipeline.deembed import (NO_FIXTURE, FixtureChain, FixtureFile, FixtureLine, PortExtension,
                              chain_for_cli, chain_from_options, chain_toml, load_chain,
                              passivity_warning, remove_two_port, write_chain_toml)
from pipeline.errors import ConfigError
from pipeline.fixture_fit import fit_port_extension
from pipeline.sweep import Provenance, Sweep

C0 = 299_792_458.0            # m/s, exact (SI definition)
DB_PER_NEPER = 20 / math.log(10)
FREQ = np.linspace(0.5e9, 3e9, 1601)


def frequency(f=FREQ) -> skrf.Frequency:
    return skrf.Frequency.from_f(f, unit="Hz")


def skrf_line(length_m, zc, vf, loss_db_of_f, f=FREQ, z0=50.0) -> skrf.Network:
    """A line built with scikit-rf media: alpha from a one-way loss L(f) over length_m."""
    alpha = loss_db_of_f(f) / DB_PER_NEPER / length_m if length_m else 0 * f
    gamma = alpha + 1j * 2 * np.pi * f / (vf * C0)
    return DefinedGammaZ0(frequency(f), z0_port=z0, z0=zc, gamma=gamma).line(length_m, "m")


def antenna(f=FREQ, z0=50.0) -> skrf.Network:
    """A 1-port device from skrf lumped elements: series R-L-C (a small resonant antenna)."""
    m = DefinedGammaZ0(frequency(f), z0_port=z0, z0=z0)
    return m.resistor(32.0) ** m.inductor(6.8e-9) ** m.capacitor(0.9e-12) ** m.short()


def lumped_two_port(f=FREQ) -> skrf.Network:
    """A 2-port fixture from skrf lumped elements (a launch: series L, shunt C, series R)."""
    m = DefinedGammaZ0(frequency(f), z0_port=50.0, z0=50.0)
    return m.inductor(1.3e-9) ** m.shunt_capacitor(0.45e-12) ** m.resistor(0.8)


def write_s2p(network: skrf.Network, path: Path) -> Path:
    network.write_touchstone(str(path.with_suffix("")), skrf_comment=False)
    return path.with_suffix(".s2p")


def sweep_of(network: skrf.Network, z0=50.0) -> Sweep:
    return Sweep(freq_hz=network.f, s11=network.s[:, 0, 0], z0_ohm=z0,
                 provenance=Provenance(dut_id="unit-7", source="bench.s1p"))


def max_error(a, b) -> float:
    return float(np.max(np.abs(np.asarray(a) - np.asarray(b))))


# ---------------------------------------------------------------- textbook results


def test_delay_moves_a_short_by_two_omega_tau():
    # TL-PORT-EXTENSION-1PORT: S11_dut = S11_meas exp(+j 2 w tau); measured with skrf media
    tau = 123e-12
    vf = 0.7
    line = skrf_line(tau * vf * C0, 50.0, vf, lambda f: 0 * f)
    m = DefinedGammaZ0(frequency(), z0_port=50.0, z0=50.0)
    measured = (line ** m.short()).s[:, 0, 0]
    removed = PortExtension(tau).remove(FREQ, measured)
    assert max_error(removed, -1.0) < 1e-12
    shift = np.angle(removed / measured)
    expected = np.angle(np.exp(2j * 2 * np.pi * FREQ * tau))
    assert max_error(np.exp(1j * shift), np.exp(1j * expected)) < 1e-12


def test_lossless_line_rotates_gamma_by_minus_two_theta():
    # TL-ROTATION-30DEG (Pozar 4th ed. Sec. 2.3, from memory): 0.5 through 30 deg -> 0.5 at -60 deg
    f = np.array([1e9])
    quarter_wave = C0 / f[0] / 4
    line = FixtureLine(length_m=quarter_wave / 3, z0_ohm=50.0, velocity_factor=1.0)  # 30 degrees
    published = 0.25 - 0.4330127018922193j
    load = DefinedGammaZ0(frequency(f), z0_port=50.0).load(0.5)
    assert abs((line.network(f) ** load).s[0, 0, 0] - published) < 1e-12
    assert abs(line.remove(f, np.array([published]))[0] - 0.5) < 1e-12


def test_one_db_of_fixture_loss_makes_return_loss_look_two_db_better():
    # TL-LOSSY-RL (common practice): the reflection passes the fixture twice
    dut_gamma = 0.2
    m = DefinedGammaZ0(frequency(), z0_port=50.0)
    fixture = skrf_line(0.1, 50.0, 0.66, lambda f: 1.0 + 0 * f)
    measured = (fixture ** m.load(dut_gamma)).s[:, 0, 0]
    rl_measured = -20 * np.log10(np.abs(measured))
    removed = PortExtension(0.1 / (0.66 * C0), loss_db_dc=1.0).remove(FREQ, measured)
    rl_dut = -20 * np.log10(np.abs(removed))
    assert np.allclose(rl_measured - rl_dut, 2.0, atol=1e-9)


def test_velocity_factor_and_delay():
    # TL-VELOCITY-FACTOR (common practice): VF = 1/sqrt(eps_eff), tau = l/(VF c)
    assert PortExtension.from_length(1.0, velocity_factor=0.66).delay_s == pytest.approx(5.054001442396243e-9, rel=1e-9)
    assert FixtureLine(1.0, 50.0, eps_eff=2.25).vf == pytest.approx(0.6666666666666666, rel=1e-12)
    assert FixtureLine(1.0, 50.0, eps_eff=2.1).vf == pytest.approx(0.6900655593423541, rel=1e-12)
    # TL-SKRF-DELAY: 1 m at VF 0.66, 1 GHz, S21 lags 1819.44 deg = 19.4405 deg mod 360
    s21 = FixtureLine(1.0, 50.0, velocity_factor=0.66).network(np.array([1e9])).s[0, 1, 0]
    assert (-np.degrees(np.angle(s21))) % 360 == pytest.approx(19.44051926264744, abs=1e-6)


def test_forty_mm_fr4_turns_about_420_degrees_at_2g4():
    # the figure: 40 mm, eps_eff 3.3, 2.4 GHz -> 2 * 360 * f * tau = 418.8 deg
    chain = load_chain("lead-40mm-fr4")
    line = chain.steps[0]
    assert 2 * 360 * 2.4e9 * line.delay_s == pytest.approx(418.8, abs=0.1)
    one_way_db = -20 * np.log10(abs(line.s_parameters(np.array([2.4e9]), 50.0)[1][0]))
    assert 0.2 < one_way_db < 0.5          # realistic FR-4 loss, a few tenths of a dB


# ---------------------------------------------------------------- exact recovery (1e-6)


def test_lossy_mismatched_line_is_removed_exactly():
    # device embedded with scikit-rf media: 62 ohm lossy line, sqrt(f) + f loss
    line = FixtureLine(length_m=0.055, z0_ohm=62.0, eps_eff=3.1, loss_db_per_m=9.0,
                       loss_ref_hz=2.4e9, conductor_fraction=0.3)

    def loss(f):
        x = f / 2.4e9
        return 9.0 * 0.055 * (0.3 * np.sqrt(x) + 0.7 * x)

    measured = (skrf_line(0.055, 62.0, 1 / math.sqrt(3.1), loss) ** antenna()).s[:, 0, 0]
    recovered = line.remove(FREQ, measured, 50.0)
    assert max_error(recovered, antenna().s[:, 0, 0]) < 1e-6
    # the same line as a mere delay is not good enough: Zc != z0 must be removed exactly
    as_delay = PortExtension(line.delay_s).remove(FREQ, measured)
    assert max_error(as_delay, antenna().s[:, 0, 0]) > 0.05


def test_line_closed_form_equals_skrf_media():
    line = FixtureLine(0.04, 35.0, velocity_factor=0.6, loss_db_per_m=5.0, loss_ref_hz=1e9,
                       conductor_fraction=0.5)
    s11, s21 = line.s_parameters(FREQ, 50.0)
    network = line.network(FREQ, 50.0)
    assert max_error(s11, network.s[:, 0, 0]) < 1e-12
    assert max_error(s11, network.s[:, 1, 1]) < 1e-12
    assert max_error(s21, network.s[:, 1, 0]) < 1e-12


def test_lumped_two_port_file_is_removed_exactly(tmp_path):
    fixture = lumped_two_port()
    path = write_s2p(fixture, tmp_path / "launch.s2p")
    measured = (fixture ** antenna()).s[:, 0, 0]
    recovered = FixtureFile(str(path)).remove(FREQ, measured, 50.0)
    assert max_error(recovered, antenna().s[:, 0, 0]) < 1e-6
    # closed form against scikit-rf's inverse cascade (library-facts.md 1.2)
    by_skrf = (fixture.inv ** (fixture ** antenna())).s[:, 0, 0]
    assert max_error(recovered, by_skrf) < 1e-9


def test_fixture_file_on_a_coarser_grid_is_interpolated(tmp_path):
    coarse = np.linspace(0.1e9, 4e9, 391)          # 10 MHz steps, covers the sweep
    path = write_s2p(lumped_two_port(coarse) ** skrf_line(0.03, 50.0, 0.7, lambda f: 0 * f, coarse),
                     tmp_path / "cable.s2p")
    fine_fixture = lumped_two_port() ** skrf_line(0.03, 50.0, 0.7, lambda f: 0 * f)
    measured = (fine_fixture ** antenna()).s[:, 0, 0]
    recovered = FixtureFile(str(path)).remove(FREQ, measured, 50.0)
    assert max_error(recovered, antenna().s[:, 0, 0]) < 1e-6      # cubic interpolation


def test_fixture_file_is_renormalised_to_the_sweep_reference(tmp_path):
    path = write_s2p(lumped_two_port(), tmp_path / "launch.s2p")
    measured = lumped_two_port() ** antenna()
    measured.renormalize(75.0)
    dut = antenna()
    dut.renormalize(75.0)
    recovered = FixtureFile(str(path)).remove(FREQ, measured.s[:, 0, 0], 75.0)
    assert max_error(recovered, dut.s[:, 0, 0]) < 1e-6


def test_reversed_fixture_file(tmp_path):
    fixture = lumped_two_port()
    path = write_s2p(fixture.flipped(), tmp_path / "written-backwards.s2p")
    measured = (fixture ** antenna()).s[:, 0, 0]
    recovered = FixtureFile(str(path), reverse_ports=True).remove(FREQ, measured, 50.0)
    assert max_error(recovered, antenna().s[:, 0, 0]) < 1e-6


def test_three_step_chain_recovers_the_device_and_records_provenance(tmp_path):
    extension = PortExtension(85e-12, loss_db_dc=0.01, loss_db_at_ref=0.05, loss_ref_hz=2.4e9)
    line = FixtureLine(0.04, 50.0, eps_eff=3.3, loss_db_per_m=8.3, loss_ref_hz=2.4e9,
                       conductor_fraction=0.13)
    path = write_s2p(lumped_two_port(), tmp_path / "launch.s2p")
    chain = FixtureChain(steps=(extension, line, FixtureFile(str(path))), name="bench", source="t")

    def loss(f):
        x = f / 2.4e9
        return 8.3 * 0.04 * (0.13 * np.sqrt(x) + 0.87 * x)

    pe_network = skrf.Network(frequency=frequency(), s=np.zeros((FREQ.size, 2, 2)), z0=50.0)
    pe_network.s[:, 0, 1] = pe_network.s[:, 1, 0] = (
        10 ** (-(0.01 + 0.04 * np.sqrt(FREQ / 2.4e9)) / 20) * np.exp(-2j * np.pi * FREQ * 85e-12))
    measured = pe_network ** skrf_line(0.04, 50.0, 1 / math.sqrt(3.3), loss) ** lumped_two_port() ** antenna()
    dut = chain.apply(sweep_of(measured))
    assert max_error(dut.s11, antenna().s[:, 0, 0]) < 1e-6
    recorded = dut.provenance.fixture
    assert [step["type"] for step in recorded] == ["port_extension", "line", "file"]
    assert all(step["chain"] == "bench" for step in recorded)
    assert recorded[2]["sha256"] and recorded[1]["delay_s"] == pytest.approx(line.delay_s)
    json.dumps(chain.describe())           # JSON-ready for the store and --json output


def test_order_matters_analyzer_side_first():
    a = FixtureLine(0.03, 75.0, velocity_factor=0.7)
    b = PortExtension(40e-12)
    measured = (a.network(FREQ) ** b.network(FREQ) ** antenna()).s[:, 0, 0]
    right = FixtureChain(steps=(a, b)).apply(sweep_of(antenna()).replace(s11=measured))
    wrong = FixtureChain(steps=(b, a)).apply(sweep_of(antenna()).replace(s11=measured))
    assert max_error(right.s11, antenna().s[:, 0, 0]) < 1e-9
    assert max_error(wrong.s11, antenna().s[:, 0, 0]) > 0.01


def test_empty_chain_leaves_the_sweep_alone():
    sweep = sweep_of(antenna())
    assert NO_FIXTURE.is_empty and NO_FIXTURE.apply(sweep) is sweep
    assert NO_FIXTURE.describe() == []


@settings(max_examples=60, deadline=None)
@given(length=st.floats(0.0, 0.5), zc=st.floats(20.0, 120.0), vf=st.floats(0.3, 1.0),
       loss=st.floats(0.0, 20.0), fraction=st.floats(0.0, 1.0),
       gamma_mag=st.floats(0.0, 0.99), gamma_deg=st.floats(-180.0, 180.0))
def test_embed_then_remove_is_identity(length, zc, vf, loss, fraction, gamma_mag, gamma_deg):
    f = np.linspace(0.1e9, 6e9, 64)
    line = FixtureLine(length, zc, velocity_factor=vf, loss_db_per_m=loss, loss_ref_hz=1e9,
                       conductor_fraction=fraction)
    dut = gamma_mag * np.exp(1j * np.radians(gamma_deg)) * np.ones_like(f)
    s11, s21 = line.s_parameters(f, 50.0)
    measured = s11 + s21 ** 2 * dut / (1 - s11 * dut)      # forward 1-port embedding
    assert max_error(line.remove(f, measured, 50.0), dut) < 1e-8


def test_remove_two_port_matches_skrf_inverse_cascade():
    fixture = lumped_two_port()
    measured = (fixture ** antenna()).s[:, 0, 0]
    s = fixture.s
    ours = remove_two_port(measured, s[:, 0, 0], s[:, 0, 1] * s[:, 1, 0], s[:, 1, 1])
    by_skrf = (fixture.inv ** (fixture ** antenna())).s[:, 0, 0]
    assert max_error(ours, by_skrf) < 1e-12


def test_port_extension_equals_skrf_inverse_cascade():
    extension = PortExtension(150e-12, loss_db_dc=0.1, loss_db_at_ref=0.6, loss_ref_hz=3e9)
    network = extension.network(FREQ)
    measured = network ** antenna()
    ours = extension.remove(FREQ, measured.s[:, 0, 0])
    assert max_error(ours, (network.inv ** measured).s[:, 0, 0]) < 1e-12
    assert extension.loss_db(np.array([0.0, 3e9, 0.75e9])) == pytest.approx([0.1, 0.6, 0.35])


def test_passivity_warning_for_overstated_loss():
    measured = sweep_of(antenna())
    assert passivity_warning(measured) is None
    too_much = FixtureChain(steps=(PortExtension(0.0, loss_db_dc=3.0),)).apply(measured)
    assert "cannot exceed 1" in passivity_warning(too_much)


# ---------------------------------------------------------------- fitting


def simulated_open(tau, loss_db_of_f, fringe_c=20e-15, standard="open", noise_db=-50.0, seed=3):
    """An open (with fringing C, skrf lumped shunt capacitor) or short behind a matched
    lossy line built with scikit-rf media, plus complex noise at noise_db (RMS)."""
    vf = 0.66
    line = skrf_line(tau * vf * C0, 50.0, vf, loss_db_of_f)
    m = DefinedGammaZ0(frequency(), z0_port=50.0)
    end = m.shunt_capacitor(fringe_c) ** m.open() if standard == "open" else m.short()
    s11 = (line ** end).s[:, 0, 0]
    rng = np.random.default_rng(seed)
    rms = 10 ** (noise_db / 20)
    return s11 + rms / math.sqrt(2) * (rng.standard_normal(FREQ.size) + 1j * rng.standard_normal(FREQ.size))


def true_loss(f):
    return 0.04 + 0.41 * np.sqrt(f / 3e9)          # one-way dB: 0.45 dB at 3 GHz


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_fit_recovers_delay_and_loss_of_an_open_behind_a_lossy_line(seed):
    tau = 242.4e-12
    measured = simulated_open(tau, true_loss, seed=seed)
    fit = fit_port_extension(FREQ, measured, standard="open", fringe_c_f=20e-15, z0=50.0)
    assert abs(fit.extension.delay_s - tau) < 1e-12                            # within 1 ps
    assert max_error(fit.extension.loss_db(FREQ), true_loss(FREQ)) < 0.05       # within 0.05 dB
    assert abs(fit.phase_offset_deg) < 2 and fit.phase_rms_deg < 1


def test_fit_of_a_short():
    tau = 480e-12
    measured = simulated_open(tau, true_loss, standard="short")
    fit = fit_port_extension(FREQ, measured, standard="short")
    assert abs(fit.extension.delay_s - tau) < 1e-12
    assert max_error(fit.extension.loss_db(FREQ), true_loss(FREQ)) < 0.05


def test_fringing_capacitance_matters_at_the_picosecond_level():
    # an open with C looks like an extra delay of about C z0 (1 ps for 20 fF at 50 ohm)
    tau = 242.4e-12
    measured = simulated_open(tau, true_loss, fringe_c=20e-15, noise_db=-120)
    ignored = fit_port_extension(FREQ, measured, standard="open", fringe_c_f=0.0)
    accounted = fit_port_extension(FREQ, measured, standard="open", fringe_c_f=20e-15)
    assert abs(accounted.extension.delay_s - tau) < 0.01e-12
    assert ignored.extension.delay_s - tau == pytest.approx(20e-15 * 50.0, rel=0.05)


def test_fit_refuses_a_short_declared_as_an_open():
    measured = simulated_open(200e-12, true_loss, standard="short")
    with pytest.raises(ConfigError, match="looks like a short"):
        fit_port_extension(FREQ, measured, standard="open")


def test_fitted_extension_written_loaded_and_applied(tmp_path):
    measured = simulated_open(242.4e-12, true_loss)
    fit = fit_port_extension(FREQ, measured, fringe_c_f=20e-15)
    chain = FixtureChain(steps=(fit.extension,), name="jig-open-fit")
    path = write_chain_toml(tmp_path / "jig.toml", chain, comments=fit.as_comments())
    loaded = load_chain(str(path))
    assert loaded.steps == chain.steps and loaded.name == "jig-open-fit"
    at_feed = loaded.apply(sweep_of(antenna()).replace(s11=measured))
    ideal_open = (1 - 2j * np.pi * FREQ * 20e-15 * 50) / (1 + 2j * np.pi * FREQ * 20e-15 * 50)
    assert max_error(at_feed.s11, ideal_open) < 0.03       # what is left is the -50 dB noise


# ---------------------------------------------------------------- chain files and options


def test_shipped_chains_load():
    sma = load_chain("sma-plus-cable")
    assert [s.describe()["type"] for s in sma.steps] == ["port_extension", "line"]
    assert sma.steps[0].delay_s == pytest.approx(85e-12)
    assert load_chain("lead-40mm-fr4").steps[0].eps_eff == 3.3


def test_chain_toml_round_trip(tmp_path):
    (tmp_path / "data").mkdir()
    path = write_s2p(lumped_two_port(), tmp_path / "data" / "launch.s2p")
    chain = FixtureChain(steps=(PortExtension(50e-12, 0.01, 0.2, 2.4e9),
                                FixtureLine(0.02, 60.0, velocity_factor=0.8),
                                FixtureFile(str(path))), name="three")
    written = write_chain_toml(tmp_path / "chains" / "three.toml", chain)
    assert 'path = "../data/launch.s2p"' in written.read_text()
    loaded = load_chain(str(written))
    assert loaded.steps[:2] == chain.steps[:2]
    assert loaded.describe()[2]["sha256"] == chain.describe()[2]["sha256"]


def test_units_in_chain_files(tmp_path):
    path = tmp_path / "units.toml"
    path.write_text('[[step]]\ntype = "port_extension"\nlength_m = "40 mm"\neps_eff = 3.3\n'
                    '[[step]]\ntype = "line"\nlength_m = "0.1m"\nz0_ohm = 50\nvelocity_factor = 0.7\n'
                    'loss_db_per_m = 2\nloss_ref_hz = "2.4 GHz"\n')
    chain = load_chain(str(path))
    assert chain.steps[0].delay_s == pytest.approx(0.04 * math.sqrt(3.3) / C0)
    assert chain.steps[1].length_m == pytest.approx(0.1) and chain.steps[1].loss_ref_hz == 2.4e9
    assert chain.name == "units"


def one_line_error(path: Path, text: str) -> str:
    path.write_text(text)
    with pytest.raises(ConfigError) as caught:
        load_chain(str(path))
    message = str(caught.value)
    assert "\n" not in message and str(path) in message
    return message


def test_negative_length_is_refused(tmp_path):
    message = one_line_error(tmp_path / "neg.toml", 'name = "x"\n\n[[step]]\ntype = "line"\n'
                             'length_m = -0.04\nz0_ohm = 50\neps_eff = 3.3\n')
    assert f"{tmp_path / 'neg.toml'}:5: step[1].length_m: must not be negative" in message


@pytest.mark.parametrize("vf", ["1.2", "0", "-0.5"])
def test_velocity_factor_outside_zero_one_is_refused(tmp_path, vf):
    message = one_line_error(tmp_path / "vf.toml", '[[step]]\ntype = "line"\nlength_m = 0.04\n'
                             f'z0_ohm = 50\nvelocity_factor = {vf}\n')
    assert "step[1].velocity_factor: must be in (0, 1]" in message


def test_fixture_file_of_wrong_port_count_is_refused(tmp_path):
    antenna().write_touchstone(str(tmp_path / "antenna"))          # a 1-port .s1p
    message = one_line_error(tmp_path / "wrong.toml", '[[step]]\ntype = "file"\npath = "antenna.s1p"\n')
    assert "step[1].path" in message and "antenna.s1p" in message and "2-port" in message
    with pytest.raises(ConfigError, match="must be a 2-port"):
        FixtureFile(str(tmp_path / "antenna.s1p"))


def test_unknown_keys_are_refused(tmp_path):
    message = one_line_error(tmp_path / "typo.toml", '[[step]]\ntype = "line"\nlenght_m = 0.04\n'
                             'z0_ohm = 50\neps_eff = 3.3\n')
    assert ":3: step[1].lenght_m: unknown key" in message
    message = one_line_error(tmp_path / "top.toml", 'nmae = "x"\n[[step]]\ntype = "port_extension"\n'
                             'delay_s = 1e-12\n')
    assert ":1: nmae: unknown key" in message
    message = one_line_error(tmp_path / "type.toml", '[[step]]\ntype = "cable"\n')
    assert "step[1].type: unknown or missing step type 'cable'" in message


def test_other_bad_chain_files(tmp_path):
    assert "at least one step" in one_line_error(tmp_path / "empty.toml", 'name = "x"\n')
    assert "[[step]] tables" in one_line_error(tmp_path / "table.toml", '[step]\ntype = "line"\n')
    assert "both" in one_line_error(tmp_path / "both.toml", '[[step]]\ntype = "port_extension"\n'
                                    'delay_s = 1e-12\nlength_m = 0.01\nvelocity_factor = 0.7\n')
    assert "write the unit" in one_line_error(tmp_path / "unit.toml", '[[step]]\ntype = "line"\n'
                                              'length_m = "40"\nz0_ohm = 50\neps_eff = 3\n')
    assert "needs loss_ref_hz" in one_line_error(tmp_path / "ref.toml", '[[step]]\ntype = "line"\n'
                                                 'length_m = 0.1\nz0_ohm = 50\neps_eff = 3\n'
                                                 'loss_db_per_m = 3\n')
    assert "file not found" in one_line_error(tmp_path / "nofile.toml", '[[step]]\ntype = "file"\n'
                                              'path = "missing.s2p"\n')


def test_fixture_file_must_cover_the_sweep(tmp_path):
    narrow = np.linspace(1e9, 2e9, 101)
    path = write_s2p(lumped_two_port(narrow), tmp_path / "narrow.s2p")
    chain = FixtureChain(steps=(FixtureFile(str(path)),), name="narrow")
    with pytest.raises(ConfigError, match="must cover the sweep") as caught:
        chain.apply(sweep_of(antenna()))
    assert "narrow.s2p" in str(caught.value) and "500 MHz" in str(caught.value)


def test_coarse_fixture_file_is_refused(tmp_path):
    coarse = np.linspace(0.1e9, 4e9, 8)
    path = write_s2p(skrf_line(0.3, 50.0, 0.7, lambda f: 0 * f, coarse), tmp_path / "coarse.s2p")
    with pytest.raises(ConfigError, match="too coarse"):
        FixtureFile(str(path))


def test_chain_from_options_and_cli_flags():
    assert chain_for_cli(None, None) is NO_FIXTURE
    assert chain_for_cli(None, "85p").steps == (PortExtension(85e-12),)
    by_length = chain_for_cli(port_length="40mm", eps_eff="3.3", port_loss="0.3", loss_ref="2.4G")
    assert by_length.steps[0].delay_s == pytest.approx(0.04 * math.sqrt(3.3) / C0)
    assert by_length.steps[0].loss_db_at_ref == 0.3 and by_length.steps[0].loss_ref_hz == 2.4e9
    assert chain_from_options(delay=1e-10, loss_db_dc=0.2).steps[0].loss_db(np.array([1e9])) == [0.2]
    assert chain_for_cli("lead-40mm-fr4").name == "lead-40mm-fr4"


@pytest.mark.parametrize("kwargs, flag", [
    ({"fixture": "lead-40mm-fr4", "port_delay": "85p"}, "--fixture"),
    ({"port_delay": "-5p"}, "--port-delay"),
    ({"port_length": "40mm", "velocity_factor": "1.5"}, "--velocity-factor"),
    ({"port_length": "40"}, "length"),
    ({"port_delay": "85p", "port_loss": "0.3"}, "--port-loss"),
    ({"port_delay": "85p", "velocity_factor": "0.7"}, "--velocity-factor"),
])
def test_bad_cli_flags_name_the_flag(kwargs, flag):
    with pytest.raises(ConfigError) as caught:
        chain_for_cli(**kwargs)
    assert flag in str(caught.value) and "\n" not in str(caught.value)


def test_step_validation_in_python():
    with pytest.raises(ConfigError, match="loss_db_at_ref: must not be below"):
        PortExtension(1e-12, loss_db_dc=0.5, loss_db_at_ref=0.2, loss_ref_hz=1e9)
    with pytest.raises(ConfigError, match="exactly one"):
        FixtureLine(0.1, 50.0, velocity_factor=0.7, eps_eff=2.0)
    with pytest.raises(ConfigError, match="conductor_fraction"):
        FixtureLine(0.1, 50.0, velocity_factor=0.7, conductor_fraction=1.5)
    with pytest.raises(ConfigError, match="eps_eff: must be at least 1"):
        FixtureLine(0.1, 50.0, eps_eff=0.5)
    with pytest.raises(ConfigError, match="nothing to write"):
        write_chain_toml("never-written.toml", NO_FIXTURE)


def test_chain_toml_text_is_readable():
    text = chain_toml(FixtureChain(steps=(FixtureLine(0.04, 50.0, eps_eff=3.3),), name="a"),
                      comments=("hello",))
    assert text.startswith("# hello\nname = \"a\"") and "velocity_factor" not in text


# ---------------------------------------------------------------- the CLI


def run_cli(argv, capsys):
    from pipeline.cli import main

    status = main(argv)
    out, err = capsys.readouterr()
    return status, out, err


def test_cli_fit_writes_a_chain_file(tmp_path, capsys):
    measured = simulated_open(242.4e-12, true_loss)
    open_net = skrf.Network(frequency=frequency(), s=measured.reshape(-1, 1, 1), z0=50.0)
    open_net.write_touchstone(str(tmp_path / "jig-open"))
    out = tmp_path / "jig.toml"
    status, stdout, err = run_cli(["fixture", "fit", str(tmp_path / "jig-open.s1p"), "--standard", "open",
                                   "--fringe-c", "0.02p", "-o", str(out), "--json"], capsys)
    assert status == 0, err
    report = json.loads(stdout)
    assert abs(report["extension"]["delay_s"] - 242.4e-12) < 1e-12
    assert load_chain(str(out)).steps[0].delay_s == pytest.approx(report["extension"]["delay_s"])
    status, _, err = run_cli(["fixture", "fit", str(tmp_path / "jig-open.s1p"), "-o", str(out)], capsys)
    assert status == 2 and "exists already" in err and err.count("\n") == 1
    status, stdout, err = run_cli(["fixture", "show", str(out), "--at", "2.4G", "--json"], capsys)
    assert status == 0, err
    shown = json.loads(stdout)
    assert shown["responses"][0]["round_trip_phase_deg"] == pytest.approx(2 * 360 * 2.4e9 * 242.4e-12, abs=1)


def test_cli_show_and_errors(tmp_path, capsys):
    status, stdout, _ = run_cli(["fixture", "show", "lead-40mm-fr4", "--at", "2.4G"], capsys)
    assert status == 0 and "418.8 deg" in stdout and "one-way" in stdout
    bad = tmp_path / "bad.toml"
    bad.write_text('[[step]]\ntype = "line"\nlength_m = 0.04\nz0_ohm = 50\nvelocity_factor = 1.2\n')
    status, _, err = run_cli(["fixture", "show", str(bad)], capsys)
    assert status == 2 and "step[1].velocity_factor" in err and err.count("\n") == 1
