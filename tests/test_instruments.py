"""Live acquisition (instruments.analyzer, .profile, .visa) against the simulated analyzer.

Everything goes through pyvisa-py over a real TCP socket on 127.0.0.1 to the threaded
SCPI server of instruments.simulator; nothing is mocked. The load is a Touchstone file
written by scikit-rf into tmp_path, so a round trip can be compared with the file.
"""

from __future__ import annotations

import dataclasses
import gc
import logging
import math
import socket
import threading
from datetime import datetime
from pathlib import Path

import numpy as np
import pytest
import pyvisa
import skrf

from instruments import Analyzer, Faults, SeriesRLC, SimulatedAnalyzer, load_profile, save_touchstone
from instruments.visa import VisaSession, _raw_socket
from pipeline.errors import ConfigError, InputFileError, InstrumentError
from pipeline.sweep import Sweep

pytestmark = pytest.mark.filterwarnings("error::ResourceWarning",
                                        "error::pytest.PytestUnraisableExceptionWarning")

START_HZ, STOP_HZ, POINTS, IFBW_HZ = 800e6, 1000e6, 1601, 100e3
FAST = 0.01          # sweep_time_scale: a 1601-point sweep at 100 kHz takes 0.26 ms
TIMEOUT_S = 0.5      # short reply timeout, so the fault tests finish quickly
GENERIC = load_profile("generic-scpi")
ASCII_ONLY = load_profile("generic-scpi-ascii")


@pytest.fixture(autouse=True)
def no_leaked_threads_or_sockets():
    """Every simulator thread ends and every VISA session and socket is closed by each test."""
    manager = pyvisa.ResourceManager("@py")
    before = set(threading.enumerate())
    sessions_before = len(manager.list_opened_resources())
    yield
    gc.collect()   # an unclosed socket would raise its ResourceWarning here
    left = [t for t in threading.enumerate() if t not in before and t.is_alive()]
    assert not left, f"threads left running: {left}"
    assert len(manager.list_opened_resources()) == sessions_before, "a VISA session was left open"


@pytest.fixture(scope="module")
def sample_file(tmp_path_factory) -> Path:
    """A 1601-point .s1p (800 MHz - 1 GHz) of an antenna-like load, written by scikit-rf.

    A series RLC (R 30 ohm, resonant at 900 MHz, Q about 10) behind 150 ps of matched line:
    |S11| < 1 everywhere and the phase turns, so every bit of the trace matters.
    """
    freq_hz = np.linspace(START_HZ, STOP_HZ, POINTS)
    rlc = SeriesRLC(r_ohm=30.0, l_h=53.05e-9, c_f=0.5895e-12)
    s11 = rlc(freq_hz) * np.exp(-2j * np.pi * freq_hz * 2 * 150e-12)
    network = skrf.Network(frequency=skrf.Frequency.from_f(freq_hz, unit="Hz"), s=s11.reshape(-1, 1, 1),
                           z0=50.0, name="sample")
    folder = tmp_path_factory.mktemp("load")
    network.write_touchstone("sample", dir=folder)
    return folder / "sample.s1p"


@pytest.fixture(scope="module")
def sample(sample_file) -> skrf.Network:
    return skrf.Network(str(sample_file))


def simulator(load, **options) -> SimulatedAnalyzer:
    """An exact (noise-free), fast simulator unless the options say otherwise."""
    options.setdefault("noise_db", -math.inf)
    options.setdefault("sweep_time_scale", FAST)
    return SimulatedAnalyzer(load, **options)


def acquire(sim: SimulatedAnalyzer, profile=GENERIC, *, retries: int = 0, **settings) -> Sweep:
    settings = {"start_hz": START_HZ, "stop_hz": STOP_HZ, "points": POINTS, "ifbw_hz": IFBW_HZ, **settings}
    with Analyzer(sim.resource, profile, timeout_s=TIMEOUT_S, retries=retries) as analyzer:
        return analyzer.acquire(**settings)


def free_port() -> int:
    """A loopback port nothing listens on (bound, then released)."""
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


# --- round trips ------------------------------------------------------------------------------

# Precision of each format: REAL,64 is bit-exact; REAL,32 rounds each value to float32
# (relative error <= 2**-24, IEEE 754); the simulator's ASCII carries 12 significant
# digits (relative error <= half a unit in the 12th digit, 5e-12).
FORMAT_RTOL = {"REAL,64": 0.0, "REAL,32": 2.0**-24, "ASCII": 5e-12 + 1e-15}


@pytest.mark.parametrize("data_format, byte_order", [
    ("REAL,64", "little"), ("REAL,64", "big"), ("REAL,32", "little"), ("REAL,32", "big"), ("ASCII", "little")])
def test_round_trip_equals_the_file(sample_file, sample, data_format, byte_order):
    with simulator(sample_file) as sim:
        sweep = acquire(sim, data_format=data_format, byte_order=byte_order)
    rtol = FORMAT_RTOL[data_format]
    expected = sample.s[:, 0, 0]
    np.testing.assert_allclose(sweep.freq_hz, sample.f, rtol=rtol, atol=0)
    np.testing.assert_allclose(sweep.s11.real, expected.real, rtol=rtol, atol=0)
    np.testing.assert_allclose(sweep.s11.imag, expected.imag, rtol=rtol, atol=0)
    assert sweep.z0_ohm == 50.0


def test_real64_round_trip_is_bit_exact(sample_file, sample):
    with simulator(sample_file) as sim:
        sweep = acquire(sim, data_format="REAL,64", byte_order="big")
    np.testing.assert_array_equal(sweep.s11, sample.s[:, 0, 0])
    np.testing.assert_array_equal(sweep.freq_hz, sample.f)


def test_real32_is_not_exact_so_the_tolerance_above_is_not_vacuous(sample_file, sample):
    with simulator(sample_file) as sim:
        sweep = acquire(sim, data_format="REAL,32")
    assert np.max(np.abs(sweep.s11 - sample.s[:, 0, 0])) > 0


def test_ascii_only_profile_is_a_different_dialect_in_a_file(sample_file, sample):
    """Long-form mnemonics, one command per write, CR LF, a derived frequency list: no new code."""
    with simulator(sample_file) as sim:
        sweep = acquire(sim, ASCII_ONLY, port=2)
        received = sim.received
    np.testing.assert_array_equal(sweep.freq_hz, np.linspace(START_HZ, STOP_HZ, POINTS))
    np.testing.assert_allclose(sweep.s11.real, sample.s[:, 0, 0].real, rtol=FORMAT_RTOL["ASCII"], atol=0)
    assert "CALCulate:PARameter:SELect S22" in received
    assert not any(";" in command for command in received)           # one command per write
    assert not any("FREQuency:DATA" in command for command in received)
    assert sweep.provenance.instrument["frequencies"] == "derive"


def test_data_format_and_byte_order_default_to_the_profiles_first(sample_file):
    with simulator(sample_file) as sim:
        binary = acquire(sim).provenance.instrument
        text = acquire(sim, ASCII_ONLY).provenance.instrument
    assert (binary["data_format"], binary["byte_order"]) == ("REAL,64", "little")
    assert text["data_format"] == "ASCII" and "byte_order" not in text


def test_provenance_records_identity_settings_and_time(sample_file):
    with simulator(sample_file) as sim:
        sweep = acquire(sim, data_format="REAL,32", byte_order="big", dut_id="A-017", lot="L-3")
        resource = sim.resource
        expected_sweep_s = sim.sweep_time_s(POINTS, IFBW_HZ)
    prov = sweep.provenance
    assert (prov.dut_id, prov.lot, prov.source, prov.port) == ("A-017", "L-3", resource, 1)
    assert datetime.fromisoformat(prov.acquired_at).utcoffset().total_seconds() == 0
    assert len(prov.source_sha256) == 64
    inst = prov.instrument
    assert inst["identity"].startswith("matchbay,simulated analyzer")
    assert (inst["start_hz"], inst["stop_hz"], inst["points"], inst["ifbw_hz"]) == (START_HZ, STOP_HZ, POINTS,
                                                                                     IFBW_HZ)
    assert (inst["parameter"], inst["data_format"], inst["byte_order"]) == ("S11", "REAL,32", "big")
    assert inst["profile"] == "generic-scpi" and inst["profile_sha256"] == GENERIC.sha256
    assert inst["sweep_time_s"] == pytest.approx(expected_sweep_s, rel=1e-9)   # the analyzer's own figure
    assert inst["attempts"] == 1


def test_port_two_measures_s22(sample_file):
    with simulator(sample_file) as sim:
        sweep = acquire(sim, port=2)
        assert ":CALC1:PAR:SEL S22;:SYST:ERR?" in sim.received
    assert sweep.provenance.instrument["parameter"] == "S22" and sweep.provenance.port == 2


def test_series_rlc_model_is_served_over_the_models_range():
    """A model load: the acquired trace is the model at the swept frequencies."""
    model = SeriesRLC()   # REFERENCES.md YB-QZ-SERIES-RLC: 50 ohm, 795.77 nH, 3.1831 pF -> f0 = 100 MHz
    with simulator(model) as sim:
        sweep = acquire(sim, start_hz=50e6, stop_hz=150e6, points=201)
    np.testing.assert_array_equal(sweep.s11, model(sweep.freq_hz))
    assert abs(sweep.s11[100]) < 1e-4      # 100 MHz: resonance, Z = R = z0


def test_commands_of_a_step_go_out_in_one_joined_write(sample_file):
    with simulator(sample_file) as sim:
        acquire(sim)
        received = sim.received
    assert ":SENS1:FREQ:STAR 800000000.0;:SENS1:FREQ:STOP 1000000000.0;:SYST:ERR?" in received
    assert "*RST" not in received     # a preset would switch the analyzer's calibration off


def test_tcp_nodelay_is_set_on_the_raw_socket(sample_file):
    with simulator(sample_file) as sim:
        session = VisaSession(sim.resource, timeout_s=1.0, read_termination="\n", write_termination="\n")
        try:
            sock = _raw_socket(session._resource)
            assert session.nodelay is True
            assert sock.getsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY) == 1
            assert session.query("*IDN?").startswith("matchbay")
        finally:
            session.close()


# --- saving -----------------------------------------------------------------------------------

def test_save_touchstone_round_trips_and_leaves_no_part_file(sample_file, sample, tmp_path):
    with simulator(sample_file) as sim:
        sweep = acquire(sim, dut_id="A-017")
    target = tmp_path / "A-017.s1p"
    target.write_text("an older file\n")
    assert save_touchstone(sweep, target) == target
    back = skrf.Network(str(target))
    np.testing.assert_array_equal(back.s[:, 0, 0], sample.s[:, 0, 0])
    np.testing.assert_array_equal(back.f, sample.f)
    assert "dut_id: A-017" in target.read_text()
    assert [p.name for p in tmp_path.iterdir()] == ["A-017.s1p"]


def test_save_touchstone_refuses_other_extensions_and_missing_folders(sample_file, tmp_path):
    with simulator(sample_file) as sim:
        sweep = acquire(sim, points=11)
    with pytest.raises(ConfigError, match=r"out\.txt: .*\.s1p"):
        save_touchstone(sweep, tmp_path / "out.txt")
    with pytest.raises(InputFileError, match="cannot write"):
        save_touchstone(sweep, tmp_path / "missing" / "out.s1p")
    assert list(tmp_path.iterdir()) == []


# --- faults: each names its step, nothing is returned, the session is closed -------------------

@pytest.mark.parametrize("faults, message", [
    (Faults(silent_sweeps=1), r"step 'wait for sweep': no reply within 0\.5 s \(query \*OPC\?, expected sweep time"),
    (Faults(late_sweeps=1, late_by_s=0.7), r"step 'wait for sweep': no reply within"),
    (Faults(dropped_blocks=1), r"step 'read trace': the analyzer closed the connection"),
    (Faults(malformed_blocks=1), r"step 'read trace': malformed IEEE 488\.2 block"),
    (Faults(swapped_blocks=1), r"step 'read trace': .*byte order"),
    (Faults(error_on="trigger", error=(-221, "Settings conflict")),
     r"step 'trigger sweep': the analyzer reported -221,\"Settings conflict\""),
], ids=["silent sweep", "late sweep", "dropped block", "malformed block", "wrong byte order", "queued error"])
def test_fault_names_its_step_and_closes_the_session(sample_file, faults, message):
    with simulator(sample_file, faults=faults) as sim:
        analyzer = Analyzer(sim.resource, GENERIC, timeout_s=TIMEOUT_S, retries=0)
        with analyzer:
            with pytest.raises(InstrumentError, match=message) as raised:
                analyzer.acquire(START_HZ, STOP_HZ, POINTS, IFBW_HZ)
            assert not analyzer.connected
    assert str(raised.value).startswith(analyzer.resource + ": step '")
    assert "\n" not in str(raised.value)


@pytest.mark.parametrize("data_format", ["REAL,64", "REAL,32"])
def test_wrong_byte_order_is_caught_by_the_plausibility_check(sample_file, data_format):
    """A swapped block decodes silently to finite garbage or NaN (library-facts §3.2)."""
    with simulator(sample_file, faults=Faults(swapped_blocks=1)) as sim:
        with pytest.raises(InstrumentError, match="byte order"):
            acquire(sim, data_format=data_format, retries=1)   # not a link fault: not retried


def test_analyzer_error_text_comes_through(sample_file):
    """The analyzer's own range check (-222) names the step that caused it."""
    with simulator(sample_file) as sim:
        with pytest.raises(InstrumentError, match=r"step 'set points': the analyzer reported -222,\"Data out of"):
            acquire(sim, points=200_001)
        with pytest.raises(InstrumentError, match=r"step 'set frequency range': .*-222"):
            acquire(sim, start_hz=700e6)     # below the file's range: outside the simulated analyzer's range


def test_several_queued_errors_are_all_reported(sample_file):
    broken = dict(GENERIC.commands, set_points=":SENS1:SWE:POIN {points};:BOGUS1;:BOGUS2")
    profile = dataclasses.replace(GENERIC, commands=broken)
    with simulator(sample_file) as sim:
        with pytest.raises(InstrumentError, match=r"step 'set points': .*-113,\"Undefined header;:BOGUS1\" "
                                                  r"\(then -113,\"Undefined header;:BOGUS2\"\)"):
            acquire(sim, profile)


@pytest.mark.parametrize("command, value, message", [
    ("read_trace", ":SENS1:FREQ:DATA?", r"step 'read trace': expected 3202 values, got 1601"),
    ("set_stop", ":SENS1:FREQ:STOP 9.5e8",
     r"step 'read frequencies': the analyzer swept 800000000 to 950000000 Hz, not 800000000 to 1e\+09 Hz"),
])
def test_data_that_does_not_fit_the_request_is_refused(sample_file, command, value, message):
    """An analyzer (or a profile) that does not do what was asked: nothing is returned."""
    profile = dataclasses.replace(GENERIC, commands=dict(GENERIC.commands, **{command: value}))
    with simulator(sample_file) as sim:
        with pytest.raises(InstrumentError, match=message):
            acquire(sim, profile, retries=1)


def test_no_instrument_at_the_address():
    with pytest.raises(InstrumentError, match=r"step 'connect': connection refused"):
        with Analyzer(f"TCPIP::127.0.0.1::{free_port()}::SOCKET", GENERIC, timeout_s=TIMEOUT_S):
            pass


def test_bad_visa_library_is_a_clear_error():
    with pytest.raises(InstrumentError, match="cannot load the VISA library"):
        Analyzer("TCPIP::127.0.0.1::1::SOCKET", GENERIC, visa_library="@no-such-backend").open()


@pytest.mark.parametrize("faults, logged", [
    (Faults(silent_sweeps=1), "back in step after a known-answer query"),
    (Faults(late_sweeps=1, late_by_s=0.7), "skipped a late reply '1'"),
    (Faults(malformed_blocks=1), "back in step after a known-answer query"),
    (Faults(dropped_blocks=1), "reconnecting (step 'read trace': the analyzer closed the connection)"),
], ids=["silent sweep", "late sweep", "malformed block", "dropped block"])
def test_retry_recovers_and_returns_the_right_data(sample_file, sample, faults, logged, caplog):
    """After a late reply every later reply would be one off; recovery must prevent that."""
    caplog.set_level(logging.INFO, logger="instruments.analyzer")
    with simulator(sample_file, faults=faults) as sim:
        sweep = acquire(sim, retries=1)
    np.testing.assert_array_equal(sweep.s11, sample.s[:, 0, 0])
    assert sweep.provenance.instrument["attempts"] == 2
    assert logged in caplog.text


def test_retries_run_out_with_the_last_step_named(sample_file):
    with simulator(sample_file, faults=Faults(silent_sweeps=3)) as sim:
        with pytest.raises(InstrumentError, match=r"step 'wait for sweep': .*\(gave up after 3 attempts\)"):
            acquire(sim, retries=2)


def test_analyzer_reopens_after_a_failure(sample_file, sample):
    with simulator(sample_file, faults=Faults(dropped_blocks=1)) as sim:
        with Analyzer(sim.resource, GENERIC, timeout_s=TIMEOUT_S, retries=0) as analyzer:
            with pytest.raises(InstrumentError):
                analyzer.acquire(START_HZ, STOP_HZ, POINTS, IFBW_HZ)
            sweep = analyzer.acquire(START_HZ, STOP_HZ, POINTS, IFBW_HZ)
            assert analyzer.connected
    np.testing.assert_array_equal(sweep.s11, sample.s[:, 0, 0])


def test_identify_and_reset(sample_file):
    with simulator(sample_file) as sim:
        with Analyzer(sim.resource, GENERIC, timeout_s=TIMEOUT_S) as analyzer:
            assert analyzer.identify() == analyzer.identity == "matchbay,simulated analyzer,SIM0001,1.0"
            analyzer.reset()
        assert "*RST;:SYST:ERR?" in sim.received


# --- settings and profile checks, before any I/O -------------------------------------------------

@pytest.mark.parametrize("settings, message", [
    ({"start_hz": 1e9, "stop_hz": 1e9}, "0 < start < stop"),
    ({"points": 1}, "points 1"),
    ({"points": 10.5}, "points 10.5"),
    ({"ifbw_hz": 0.0}, "IF bandwidth"),
    ({"port": 3}, "port 3"),
    ({"data_format": "REAL,16"}, "data format 'REAL,16'"),
    ({"byte_order": "middle"}, "byte order 'middle'"),
])
def test_bad_settings_are_config_errors_before_any_io(settings, message):
    analyzer = Analyzer(f"TCPIP::127.0.0.1::{free_port()}::SOCKET", GENERIC)   # nobody listens
    full = {"start_hz": START_HZ, "stop_hz": STOP_HZ, "points": POINTS, "ifbw_hz": IFBW_HZ, **settings}
    with pytest.raises(ConfigError, match=message):
        analyzer.acquire(**full)
    assert not analyzer.connected


def test_profile_refuses_a_format_it_does_not_offer():
    with pytest.raises(ConfigError, match=r"generic-scpi-ascii\.toml: data format 'REAL,64' is not offered"):
        ASCII_ONLY.check_supports("REAL,64", "little")


def test_bad_analyzer_options():
    with pytest.raises(ConfigError, match="retries"):
        Analyzer("TCPIP::127.0.0.1::1::SOCKET", GENERIC, retries=-1)
    with pytest.raises(ConfigError, match="timeout"):
        Analyzer("TCPIP::127.0.0.1::1::SOCKET", GENERIC, timeout_s=0)


GENERIC_TEXT = GENERIC.path.read_text()


def write_profile(tmp_path: Path, old: str, new: str) -> Path:
    assert old in GENERIC_TEXT
    path = tmp_path / "edited.toml"
    path.write_text(GENERIC_TEXT.replace(old, new, 1))
    return path


@pytest.mark.parametrize("old, new, message", [
    ('[commands]\n', '[commands]\nread_traces = ":X?"\n', r"edited\.toml: commands\.read_traces: unknown key"),
    ('read_trace = ":CALC1:DATA:COMP?"\n', "", r"edited\.toml: commands\.read_trace: missing key"),
    ('read_frequencies = ":SENS1:FREQ:DATA?"\n', "", r"commands\.read_frequencies: missing key .*query"),
    ("POIN {points}", "POIN {count}", r"commands\.set_points: unknown placeholder \{count\} \(allowed: \{points\}\)"),
    ("BWID {ifbw_hz}", "BWID 1000", r"commands\.set_ifbw: must contain one of \{ifbw_hz\}"),
    ("STAR {start_hz}", "STAR {start_hz:q}", r"commands\.set_start: bad template"),
    (":INIT1:IMM", "INIT1:IMM", r"commands\.trigger: must start with ':' or '\*'"),
    ('frequencies = "query"', 'frequencies = "list"', r"sweep\.frequencies: must be one of query, derive"),
    ("io_timeout_s = 5.0", "io_timeout_s = -1", r"connection\.io_timeout_s: must be a positive number"),
    ('"REAL,32" = ', '"REAL,16" = ', r"data_formats\.REAL,16: unknown key"),
    ("[byte_orders]", "[byte_order]", r"byte_order: unknown key"),
    ("join_commands = true", "join_commands = yes", r"edited\.toml:15: TOML syntax error"),
    ('read_termination = "\\n"', 'read_termination = ""', r"connection\.read_termination: must not be empty"),
])
def test_profile_mistakes_name_the_file_and_key(tmp_path, old, new, message):
    with pytest.raises(ConfigError, match=message):
        load_profile(write_profile(tmp_path, old, new))


def test_binary_formats_need_byte_orders(tmp_path):
    start = GENERIC_TEXT.index("[byte_orders]")
    path = tmp_path / "no-orders.toml"
    path.write_text(GENERIC_TEXT[:start])
    with pytest.raises(ConfigError, match=r"no-orders\.toml: byte_orders: missing table"):
        load_profile(path)


def test_unknown_profile_name_lists_the_available_ones():
    with pytest.raises(ConfigError, match=r"available: generic-scpi, generic-scpi-ascii"):
        load_profile("no-such-analyzer")


def test_shipped_profiles_render_every_command():
    for profile in (GENERIC, ASCII_ONLY):
        values = {"start_hz": 1e9, "stop_hz": 2e9, "points": 11, "ifbw_hz": 1e3, "parameter": "S11", "port": 1}
        assert all(profile.command(key, **values) for key in profile.commands)
    assert ASCII_ONLY.command("set_start", start_hz=902.5e6) == "SENSe:FREQuency:STARt 902500000"


# --- the series-RLC model against an independent library -------------------------------------------

def test_series_rlc_matches_a_scikit_rf_cascade():
    """Series R, L, C to ground built from scikit-rf media elements (terminated by a short)."""
    freq = skrf.Frequency.from_f(np.linspace(50e6, 150e6, 101), unit="Hz")
    media = skrf.media.DefinedGammaZ0(frequency=freq, z0=50.0)
    model = SeriesRLC(r_ohm=30.0, l_h=795.77e-9, c_f=3.1831e-12)
    cascade = media.resistor(30.0) ** media.inductor(795.77e-9) ** media.capacitor(3.1831e-12) ** media.short()
    np.testing.assert_allclose(model(freq.f), cascade.s[:, 0, 0], rtol=1e-12, atol=1e-14)
