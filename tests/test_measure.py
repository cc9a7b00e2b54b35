"""``matchbay measure`` and pipeline.bench: the bench flow against the simulated analyzer.

Every measurement goes through pyvisa-py over a real TCP socket on 127.0.0.1 to
instruments.SimulatedAnalyzer, which serves a Touchstone file written by scikit-rf into
tmp_path; the results store is a real HDF5 file. The reference for "the right match" is
``matchbay match`` run on the very file the simulator serves: with REAL,64 on the file's own
frequency grid the acquired trace is bit-exact (tests/test_instruments.py), so the two
paths must agree.
"""

from __future__ import annotations

import hashlib
import io
import json
import math
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import skrf

from instruments import Faults, SeriesRLC, SimulatedAnalyzer
from instruments.simulator import IDENTITY
from pipeline.bench import check_dut_id, default_span, raw_file_name, read_dut_ids
from pipeline.cli import main
from pipeline.errors import ConfigError
from pipeline.store import ResultsStore
from test_instruments import free_port, no_leaked_threads_or_sockets  # noqa: F401  (an autouse fixture)

pytestmark = pytest.mark.filterwarnings("error::ResourceWarning",
                                        "error::pytest.PytestUnraisableExceptionWarning")

REPO = Path(__file__).resolve().parents[1]
BAND = "902M:928M"
START, STOP, POINTS = "850M", "1000M", 401          # the file's own grid
FAST = 0.01                                         # sweep_time_scale
TIMEOUT = "0.5"                                     # reply timeout, s: the fault tests end quickly
CAUTION_WORDS = "wrist strap"


@pytest.fixture(scope="module")
def antenna_file(tmp_path_factory) -> Path:
    """A 915 MHz-band antenna-like load, 401 points 850 MHz - 1 GHz, written by scikit-rf.

    A series RLC (20 ohm, 30 nH, resonant at 940 MHz, Q about 9) behind 100 ps of matched
    line: poorly matched in 902-928 MHz (RL about 3 dB), so the network is not trivial.
    """
    freq_hz = np.linspace(850e6, 1000e6, POINTS)
    rlc = SeriesRLC(r_ohm=20.0, l_h=30e-9, c_f=1 / ((2 * np.pi * 940e6) ** 2 * 30e-9))
    s11 = rlc(freq_hz) * np.exp(-2j * np.pi * freq_hz * 2 * 100e-12)
    network = skrf.Network(frequency=skrf.Frequency.from_f(freq_hz, unit="Hz"), s=s11.reshape(-1, 1, 1),
                           z0=50.0, name="antenna")
    folder = tmp_path_factory.mktemp("load")
    network.write_touchstone("antenna", dir=folder)
    return folder / "antenna.s1p"


def simulator(load, **options) -> SimulatedAnalyzer:
    """Exact (noise-free) and fast unless the options say otherwise."""
    options.setdefault("noise_db", -math.inf)
    options.setdefault("sweep_time_scale", FAST)
    return SimulatedAnalyzer(load, **options)


def run(capsys, *args) -> tuple[int, str, str]:
    status = main([str(a) for a in args])
    out, err = capsys.readouterr()
    return status, out, err


def measure(capsys, resource: str, *args) -> tuple[int, str, str]:
    """``matchbay measure`` on the file's own grid, with short timeouts."""
    return run(capsys, "measure", "--resource", resource, "--band", BAND, "--start", START, "--stop", STOP,
               "--points", POINTS, "--timeout", TIMEOUT, *args)


def stored_records(path: Path) -> list:
    with ResultsStore(path, mode="r") as store:
        return [store.get_unit(i) for i in range(len(store))]


def digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


# --- one measurement --------------------------------------------------------------------------

@pytest.mark.parametrize("fixture_flags", [[], ["--port-delay", "30p"]], ids=["bare", "port extension"])
def test_single_measure_gives_the_same_match_as_match_on_the_file(capsys, antenna_file, fixture_flags):
    with simulator(antenna_file) as sim:
        status, out, err = measure(capsys, sim.resource, "--json", "--dut-id", "A-017", *fixture_flags)
        received, resource = sim.received, sim.resource
    assert status == 0, err
    measured = json.loads(out)
    status, out, err = run(capsys, "match", antenna_file, "--band", BAND, "--json", *fixture_flags)
    assert status == 0, err
    reference = json.loads(out)
    best, expected = measured["solutions"][0], reference["solutions"][0]
    assert best["elements"] == expected["elements"]
    assert best["return_loss_db"] == pytest.approx(expected["return_loss_db"], abs=0.01)
    assert measured["band_hz"] == reference["band_hz"] == [902e6, 928e6]
    assert measured["fixture"] == reference["fixture"]
    assert (measured["dut_id"], measured["source"]) == ("A-017", resource)
    assert measured["pass_after"] == (best["return_loss_db"] >= measured["spec_rl_db"])
    assert ":SENS1:SWE:POIN 401;:SYST:ERR?" in received         # the analyzer was asked for the grid
    assert "*RST" not in received                                # never a preset: it drops the calibration


def test_default_sweep_is_the_band_widened(capsys, antenna_file):
    with simulator(antenna_file) as sim:
        status, out, err = run(capsys, "measure", "--resource", sim.resource, "--band", BAND, "--json")
        received = sim.received
    assert status == 0, err
    instrument = json.loads(out)["instrument"]
    start, stop = default_span((902e6, 928e6))
    assert (instrument["start_hz"], instrument["stop_hz"]) == (start, stop)
    assert (instrument["points"], instrument["ifbw_hz"]) == (401, 10e3)
    assert f":SENS1:FREQ:STAR {start};:SENS1:FREQ:STOP {stop};:SYST:ERR?" in received


def test_default_span_rules():
    # half the band's width each side, but at least 2 % of the centre, never below half the lower edge
    assert default_span((900e6, 1000e6)) == pytest.approx((850e6, 1050e6))
    assert default_span((902e6, 928e6)) == pytest.approx((915e6 * 0.98 - 13e6, 915e6 * 1.02 + 13e6))
    assert default_span((1e6, 100e6)) == pytest.approx((0.5e6, 149.5e6))


def test_store_gets_one_record_with_the_instrument_identity(capsys, antenna_file, tmp_path):
    store = tmp_path / "bench.h5"
    with simulator(antenna_file) as sim:
        status, out, err = measure(capsys, sim.resource, "--store", store, "--dut-id", "A-017", "--lot", "L-9",
                                   "--format", "REAL,32", "--byte-order", "big")
        resource = sim.resource
    assert status == 0, err
    [record] = stored_records(store)
    instrument = record.extras["instrument"]
    assert instrument["identity"] == IDENTITY
    assert instrument["resource"] == resource and instrument["profile"] == "generic-scpi"
    assert (instrument["data_format"], instrument["byte_order"], instrument["points"]) == ("REAL,32", "big", 401)
    assert (record.dut_id, record.lot, record.source) == ("A-017", "L-9", resource)
    expected = skrf.Network(str(antenna_file)).s[:, 0, 0]
    np.testing.assert_allclose(record.s11_raw, expected, rtol=2.0**-24, atol=0)   # float32 rounding (IEEE 754)
    assert "stored as record #0" in out


def test_a_recovered_link_fault_is_shown_and_the_record_says_so(capsys, antenna_file, tmp_path):
    store = tmp_path / "bench.h5"
    with simulator(antenna_file, faults=Faults(dropped_blocks=1)) as sim:
        status, out, err = measure(capsys, sim.resource, "--store", store, "--retries", "1")
    assert status == 0, err
    assert err == ""
    assert "a link fault was recovered (attempt 2)" in out
    [record] = stored_records(store)
    assert record.extras["instrument"]["attempts"] == 2
    assert record.dut_id.startswith("unit-")                   # the default DUT id


def test_save_touchstone_writes_the_raw_sweep(capsys, antenna_file, tmp_path):
    folder = tmp_path / "raw"
    folder.mkdir()
    store = tmp_path / "bench.h5"
    with simulator(antenna_file) as sim:
        status, out, err = measure(capsys, sim.resource, "--save-touchstone", folder, "--dut-id", "A/017",
                                   "--store", store, "--port-delay", "30p")
    assert status == 0, err
    [saved] = list(folder.iterdir())                           # no .part file left behind
    assert saved.name.startswith("A_017_") and saved.suffix == ".s1p"
    back = skrf.Network(str(saved))
    np.testing.assert_array_equal(back.s[:, 0, 0], skrf.Network(str(antenna_file)).s[:, 0, 0])  # raw, not de-embedded
    [record] = stored_records(store)
    assert record.extras["raw_touchstone"] == str(saved)


def test_raw_file_names_are_safe_and_timestamped():
    assert raw_file_name("A/17 x", "2025-03-14T10:15:02.123+00:00") == "A_17_x_20250314T101502.123Z.s1p"
    assert raw_file_name("..", "2025-03-14T11:15:02.5+01:00") == "unit_20250314T101502.500Z.s1p"


# --- faults: exit 2, one line naming the step, the store untouched ---------------------------

FAULTS = [
    (Faults(silent_sweeps=1), "step 'wait for sweep': no reply within"),
    (Faults(dropped_blocks=1), "step 'read trace': the analyzer closed the connection"),
    (Faults(malformed_blocks=1), "step 'read trace': malformed IEEE 488.2 block"),
    (Faults(error_on="trigger", error=(-221, "Settings conflict")),
     "step 'trigger sweep': the analyzer reported -221,\"Settings conflict\""),
    (None, "step 'connect': connection refused"),
]
FAULT_IDS = ["timeout in the sweep", "dropped mid-block", "malformed block", "queued error", "no instrument"]


def measure_with_fault(capsys, antenna_file, faults, *args):
    if faults is None:
        return measure(capsys, f"TCPIP::127.0.0.1::{free_port()}::SOCKET", "--retries", "0", *args)
    with simulator(antenna_file, faults=faults) as sim:
        return measure(capsys, sim.resource, "--retries", "0", *args)


@pytest.mark.parametrize("faults, message", FAULTS, ids=FAULT_IDS)
def test_fault_is_one_line_and_no_store_is_created(capsys, antenna_file, tmp_path, faults, message):
    store = tmp_path / "new.h5"
    status, out, err = measure_with_fault(capsys, antenna_file, faults, "--store", store)
    assert status == 2
    assert len(err.splitlines()) == 1 and err.startswith("matchbay: TCPIP::127.0.0.1::")
    assert message in err
    assert list(tmp_path.iterdir()) == []                       # neither the store nor its lock file
    assert CAUTION_WORDS in out                                 # a live session begins with the caution


@pytest.mark.parametrize("faults, message", FAULTS, ids=FAULT_IDS)
def test_fault_leaves_an_existing_store_unchanged(capsys, antenna_file, tmp_path, faults, message):
    store = tmp_path / "bench.h5"
    with simulator(antenna_file) as sim:
        assert measure(capsys, sim.resource, "--store", store)[0] == 0
    before = digest(store)
    status, _, err = measure_with_fault(capsys, antenna_file, faults, "--store", store)
    assert status == 2 and message in err and len(err.splitlines()) == 1
    assert digest(store) == before
    assert len(stored_records(store)) == 1


# --- option errors: before the analyzer is touched ---------------------------------------------

@pytest.mark.parametrize("args, message", [
    ([], "--resource: give the analyzer's VISA resource"),
    (["--simulate", "--resource", "TCPIP::127.0.0.1::1::SOCKET"], "either --resource"),
    (["--resource", "R", "--start", "910M"], "--start/--stop: the sweep 910 MHz to"),
    (["--resource", "R", "--series", "E7"], "--series: unknown part series 'E7'"),
    (["--resource", "R", "--loop", "--dut-id", "A"], "--dut-id: in --loop mode"),
    (["--resource", "R", "--ifbw", "ten"], "--ifbw: cannot read IF bandwidth"),
    (["--resource", "R", "--format", "REAL,16"], "data format 'REAL,16'"),
    (["--resource", "R", "--save-touchstone", "no-such-folder"], "no-such-folder: is not an existing folder"),
    (["--resource", "R", "--profile", "no-such-profile"], "no-such-profile"),
    (["--simulate", "no-such-sample"], "no-such-sample: no such file or bundled sample"),
    (["elsewhere.s1p", "--resource", "R"], "a LOAD is only served with --simulate"),
], ids=["no analyzer", "both", "span misses band", "series", "dut id in loop", "ifbw", "format",
        "raw folder", "profile", "sample", "load without simulate"])
def test_bad_options_are_one_line_before_connecting(capsys, args, message):
    status, out, err = run(capsys, "measure", "--band", BAND, *args)
    assert status == 2
    assert len(err.splitlines()) == 1 and message in err
    assert CAUTION_WORDS not in out                             # nothing started


def test_a_file_that_is_not_a_store_is_refused_and_kept(capsys, tmp_path):
    other = tmp_path / "notes.h5"
    other.write_text("not HDF5\n")
    status, _, err = run(capsys, "measure", "--resource", "R", "--band", BAND, "--store", other)
    assert status == 2 and str(other) in err
    assert other.read_text() == "not HDF5\n"


def test_dut_ids_are_checked():
    assert check_dut_id("  LKS-0001\r\n") == "LKS-0001"
    for bad, message in [("", "empty"), ("A\x07B", "control"), ("x" * 129, "longer than 128")]:
        with pytest.raises(ConfigError, match=message):
            check_dut_id(bad)


# --- the bench loop ------------------------------------------------------------------------------

def loop(capsys, monkeypatch, resource: str, lines: str, *args):
    monkeypatch.setattr(sys, "stdin", io.StringIO(lines))
    return measure(capsys, resource, "--loop", *args)


def test_loop_measures_two_duts_and_stops_on_an_empty_line(capsys, monkeypatch, antenna_file, tmp_path):
    store = tmp_path / "bench.h5"
    with simulator(antenna_file, noise_db=-60.0, seed=7) as sim:     # noise: two DUTs, two traces
        status, out, err = loop(capsys, monkeypatch, sim.resource, "A-001\nA-002\n\nA-003\n", "--store", store)
        triggers = sum(":INIT1:IMM" in message for message in sim.received)
    assert status == 0, err
    assert triggers == 2                                              # A-003 came after the stop
    records = stored_records(store)
    assert [r.dut_id for r in records] == ["A-001", "A-002"]
    assert all(r.extras["instrument"]["identity"] == IDENTITY for r in records)
    assert out.count(CAUTION_WORDS) == 1                              # once per session, not per DUT
    assert "session ended: 2 units measured" in out and f"2 stored in {store}" in out
    fails = sum(not r.pass_before for r in records)
    assert f"{2 - fails} passed, {fails} failed as measured" in out


@pytest.mark.parametrize("ending", ["q\n", "QUIT\n", ""], ids=["q", "quit", "end of input"])
def test_loop_stops_on_q_or_end_of_input(capsys, monkeypatch, antenna_file, ending):
    with simulator(antenna_file, noise_db=-60.0, seed=1) as sim:
        status, out, err = loop(capsys, monkeypatch, sim.resource, "A-001\n" + ending)
    assert status == 0, err
    assert "session ended: 1 unit measured" in out


def test_loop_reports_a_failed_dut_and_goes_on(capsys, monkeypatch, antenna_file, tmp_path):
    store = tmp_path / "bench.h5"
    with simulator(antenna_file, faults=Faults(dropped_blocks=1)) as sim:
        status, out, err = loop(capsys, monkeypatch, sim.resource, "A-001\nA-002\n", "--store", store,
                                "--retries", "0")
    assert status == 0
    [line] = err.splitlines()
    assert line.startswith("matchbay: DUT A-001: ") and "step 'read trace'" in line and "nothing stored" in line
    assert [r.dut_id for r in stored_records(store)] == ["A-002"]
    assert "1 unit measured" in out and "1 measurement failed" in out and "1 stored" in out


def test_loop_reports_a_bad_dut_id_and_goes_on(capsys, monkeypatch, antenna_file):
    with simulator(antenna_file) as sim:
        status, out, err = loop(capsys, monkeypatch, sim.resource, "x" * 200 + "\nA-002\n")
    assert status == 0
    assert "longer than 128 bytes" in err and "1 unit measured" in out


def test_dut_ids_are_shown_literally(capsys, monkeypatch, antenna_file):
    with simulator(antenna_file) as sim:
        status, out, err = loop(capsys, monkeypatch, sim.resource, "LOT[bold]-7\n")
    assert status == 0, err
    assert "LOT[bold]-7  as measured" in out                         # not taken for rich markup


def test_a_bit_identical_trace_is_not_stored_twice(capsys, monkeypatch, antenna_file, tmp_path):
    """A noise-free simulator repeats its trace exactly; a real analyzer does so only when it
    did not sweep again, which the operator is told."""
    store = tmp_path / "bench.h5"
    with simulator(antenna_file) as sim:
        status, out, err = loop(capsys, monkeypatch, sim.resource, "A-001\nA-002\n", "--store", store)
    assert status == 0, err
    assert "bit-identical to stored record #0, not stored again" in out
    assert [r.dut_id for r in stored_records(store)] == ["A-001"]
    assert "2 units measured" in out and "1 stored" in out


class _StdinInterrupted(io.StringIO):
    """Standard input on which the operator presses Ctrl-C after the given lines."""

    def readline(self, *args):
        line = super().readline(*args)
        if not line:
            raise KeyboardInterrupt
        return line


def test_ctrl_c_ends_the_loop_cleanly(capsys, monkeypatch, antenna_file, tmp_path):
    store = tmp_path / "bench.h5"
    with simulator(antenna_file) as sim:
        monkeypatch.setattr(sys, "stdin", _StdinInterrupted("A-001\n"))
        status, out, err = measure(capsys, sim.resource, "--loop", "--store", store)
    assert status == 0, err
    assert "session interrupted: 1 unit measured" in out
    assert len(stored_records(store)) == 1


def test_read_dut_ids_prompts_before_each_line():
    asked = []
    ids = list(read_dut_ids(io.StringIO(" A-1 \nA-2\n\nA-3\n"), prompt=lambda: asked.append(1)))
    assert ids == ["A-1", "A-2"] and len(asked) == 3


# --- --simulate: the bench flow without hardware ---------------------------------------------------

def test_simulate_runs_end_to_end_on_the_bundled_sample(capsys, tmp_path):
    store = tmp_path / "try.h5"
    status, out, err = run(capsys, "measure", "--simulate", "--store", store, "--dut-id", "TRY-1")
    assert status == 0, err
    assert "simulated analyzer serving" in out and "larkspur_915.s1p" in out
    assert "match over 902 MHz – 928 MHz" in out
    assert CAUTION_WORDS not in out                                 # no live hardware
    [record] = stored_records(store)
    assert record.dut_id == "TRY-1" and record.extras["instrument"]["identity"] == IDENTITY
    assert (record.band_lo_hz, record.band_hi_hz) == (902e6, 928e6)
    assert record.rl_after_worst_db > record.rl_before_worst_db


def test_simulate_loop_in_a_real_process_reads_stdin_and_prints_json_lines(tmp_path):
    store = tmp_path / "try.h5"
    command = [sys.executable, "-m", "pipeline.cli", "measure", "--simulate", "wren_chip_2g4", "--loop", "--json",
               "--store", str(store)]
    done = subprocess.run(command, input="W-1\nW-2\n\n", capture_output=True, text=True, cwd=REPO, timeout=120)
    assert done.returncode == 0, done.stderr
    results = [json.loads(line) for line in done.stdout.splitlines()]
    assert [r["dut_id"] for r in results] == ["W-1", "W-2"]
    assert all(r["band_hz"] == [2.4e9, 2.4835e9] and r["solutions"][0]["elements"] for r in results)
    assert [r["record"] for r in results] == [0, 1]
    assert "session ended: 2 units measured" in done.stderr         # with --json the notes go to stderr
    assert [r.dut_id for r in stored_records(store)] == ["W-1", "W-2"]
