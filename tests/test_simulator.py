"""The simulated analyzer (instruments.simulator) as a SCPI instrument, seen through pyvisa-py.

These tests talk to the server the way any SCPI client would (a raw TCP socket through
pyvisa-py), to pin down the dialect, the error queue and the clean shutdown that the
acquisition tests rely on. SCPI and IEEE 488.2 facts are from memory
(/work/shared/reference/REFERENCES.md §7).
"""

from __future__ import annotations

import math
import socket
import struct
import threading
import time

import numpy as np
import pytest
import pyvisa
import skrf

from instruments.simulator import (ASCII_DIGITS, ERROR_QUEUE_LENGTH, IDENTITY, MAX_MESSAGE_BYTES,
                                   SWEEP_OVERHEAD_S, Faults, SeriesRLC, SimulatedAnalyzer)
from pipeline.errors import InputFileError

pytestmark = pytest.mark.filterwarnings("error::ResourceWarning",
                                        "error::pytest.PytestUnraisableExceptionWarning")


@pytest.fixture(autouse=True)
def no_leaked_threads():
    before = set(threading.enumerate())
    yield
    left = [t for t in threading.enumerate() if t not in before and t.is_alive()]
    assert not left, f"threads left running: {left}"


@pytest.fixture
def sim():
    with SimulatedAnalyzer(SeriesRLC(), sweep_time_scale=0.0, noise_db=-math.inf) as analyzer:
        yield analyzer


def connect(analyzer: SimulatedAnalyzer, timeout_s: float = 2.0):
    return pyvisa.ResourceManager("@py").open_resource(
        analyzer.resource, read_termination="\n", write_termination="\n", timeout=timeout_s * 1000)


@pytest.fixture
def scpi(sim):
    resource = connect(sim)
    yield resource
    resource.close()


def errors(scpi) -> list[str]:
    """Empty the error queue; the entries, oldest first, without the final "No error"."""
    found = []
    for _ in range(ERROR_QUEUE_LENGTH + 2):
        reply = scpi.query("SYST:ERR?")
        if reply == '+0,"No error"':
            return found
        found.append(reply)
    raise AssertionError(f"error queue does not empty: {found}")


def test_identity_and_settings_in_short_and_long_form(scpi):
    assert scpi.query("*IDN?") == IDENTITY
    scpi.write(":SENS1:FREQ:STAR 1.5e8")
    assert float(scpi.query("sense:frequency:start?")) == 1.5e8
    scpi.write("SENSe:FREQuency:STOP 2.5e8")
    assert float(scpi.query(":FREQ:STOP?")) == 2.5e8            # [SENSe] is optional
    scpi.write("SWE:POIN 401;:BWID:RES 1000")
    assert scpi.query("SENS:SWE:POIN?;:SENSE1:BWIDTH?") == "401;1.00000000000e+03"   # ';'-joined replies
    scpi.write("FORMAT ASCII;:FORM:BORD SWAPPED")
    assert scpi.query("FORM?;:FORM:BORD?") == "ASCII;SWAP"
    assert errors(scpi) == []


def test_error_codes_and_event_status(scpi):
    scpi.write("BOGUS:CMD 1")
    scpi.write("SENS2:FREQ:STAR 1e9")
    scpi.write("SENS:SWE:POIN 1")
    scpi.write("FORM:DATA REAL,16")
    scpi.write("SENS:SWE:POIN")
    scpi.write("SENS:SWE:POIN many")
    scpi.write("INIT:IMM")                                       # still sweeping continuously
    assert int(scpi.query("*ESR?")) == 32 | 16                   # command and execution errors
    assert int(scpi.query("*ESR?")) == 0                         # reading clears it
    assert errors(scpi) == ['-113,"Undefined header;BOGUS:CMD"', '-114,"Header suffix out of range;SENS2:FREQ:STAR"',
                            '-222,"Data out of range"', '-224,"Illegal parameter value"', '-109,"Missing parameter"',
                            '-104,"Data type error"', '-213,"Init ignored"']


def test_error_queue_overflow_keeps_ten_and_marks_the_last(scpi):
    for i in range(ERROR_QUEUE_LENGTH + 3):
        scpi.write(f"NOPE{i}")
    found = errors(scpi)
    assert len(found) == ERROR_QUEUE_LENGTH
    assert found[0] == '-113,"Undefined header;NOPE0"' and found[-1] == '-350,"Queue overflow"'


def test_clear_and_reset(scpi, sim):
    scpi.write("NOPE;:SENS:SWE:POIN 11")
    scpi.write("*CLS")
    assert errors(scpi) == []
    scpi.write("*RST")
    assert scpi.query("SENS:SWE:POIN?") == "201"
    assert float(scpi.query("SENS:FREQ:STAR?")) == 100e3 and float(scpi.query("SENS:FREQ:STOP?")) == 20e9


def test_binary_block_layout_and_byte_orders(scpi):
    """IEEE 488.2 definite-length block #<n><length><bytes>; NORMal = big-endian."""
    scpi.write(":SENS:FREQ:STAR 1e8;:SENS:FREQ:STOP 2e8;:SENS:SWE:POIN 3;:INIT:CONT OFF;:INIT")
    model = SeriesRLC()(np.array([1e8, 1.5e8, 2e8]))
    interleaved = np.column_stack([model.real, model.imag]).ravel()
    for fmt, order, code in [("REAL,64", "NORM", ">6d"), ("REAL,64", "SWAP", "<6d"),
                             ("REAL,32", "NORM", ">6f"), ("REAL,32", "SWAP", "<6f")]:
        scpi.write(f"FORM {fmt};:FORM:BORD {order}")
        scpi.write("CALC:DATA:COMP?")
        size = struct.calcsize(code)
        assert scpi.read_bytes(2) == b"#" + str(len(str(size))).encode()
        assert scpi.read_bytes(len(str(size))) == str(size).encode()
        payload = scpi.read_bytes(size + 1)
        assert payload.endswith(b"\n")
        np.testing.assert_allclose(struct.unpack(code, payload[:-1]), interleaved,
                                   rtol=0 if fmt == "REAL,64" else 2.0**-24)
    scpi.write("FORM ASC")
    values = scpi.query_ascii_values("CALC:DATA:COMP?")
    assert all(len(text.split("e")[0].replace("-", "").replace(".", "")) == ASCII_DIGITS
               for text in scpi.query("CALC:DATA:COMP?").split(","))
    np.testing.assert_allclose(values, interleaved, rtol=5e-12)
    assert scpi.query_ascii_values("SENS:FREQ:DATA?") == [1e8, 1.5e8, 2e8]


def test_sweep_takes_points_over_ifbw_plus_overhead():
    with SimulatedAnalyzer(SeriesRLC(), sweep_time_scale=0.5, noise_db=-math.inf) as sim:
        scpi = connect(sim)
        try:
            scpi.write("INIT:CONT OFF;:SENS:SWE:POIN 201;:SENS:BWID 1000")
            expected = (201 / 1000 + SWEEP_OVERHEAD_S) * 0.5
            assert float(scpi.query("SENS:SWE:TIME?")) == pytest.approx(expected, rel=1e-9)
            started = time.monotonic()
            assert scpi.query("INIT;*OPC?") == "1"
            assert time.monotonic() - started >= expected * 0.99      # the reply waits for the sweep
        finally:
            scpi.close()


def test_noise_level_is_what_was_asked():
    with SimulatedAnalyzer(SeriesRLC(), sweep_time_scale=0.0, noise_db=-40.0, seed=7) as sim:
        scpi = connect(sim)
        try:
            scpi.write("INIT:CONT OFF;:SENS:FREQ:STAR 5e7;:SENS:FREQ:STOP 1.5e8;:SENS:SWE:POIN 20001;:FORM REAL,64")
            scpi.write("INIT")
            trace = scpi.query_binary_values("CALC:DATA:COMP?", datatype="d", is_big_endian=True,
                                             container=np.array)
        finally:
            scpi.close()
    residual = trace[0::2] + 1j * trace[1::2] - SeriesRLC()(np.linspace(5e7, 1.5e8, 20001))
    rms_db = 20 * np.log10(np.sqrt(np.mean(np.abs(residual) ** 2)))
    assert rms_db == pytest.approx(-40.0, abs=0.2)   # 20001 samples: the estimate is within ~0.05 dB


def test_file_load_sets_the_frequency_range(tmp_path):
    freq = skrf.Frequency.from_f(np.linspace(1e9, 2e9, 11), unit="Hz")
    network = skrf.Network(frequency=freq, s=np.full((11, 1, 1), 0.2 + 0.1j), z0=50.0)
    network.write_touchstone("flat", dir=tmp_path)
    with SimulatedAnalyzer(tmp_path / "flat.s1p", sweep_time_scale=0.0, noise_db=-math.inf) as sim:
        scpi = connect(sim)
        try:
            scpi.write("SENS:FREQ:STAR 0.9e9;:SENS:FREQ:STAR 1.2e9;:SENS:FREQ:STOP 2.1e9")
            assert errors(scpi) == ['-222,"Data out of range"', '-222,"Data out of range"']
            scpi.write("INIT:CONT OFF;:INIT;:FORM ASC")
            assert scpi.query_ascii_values("CALC:DATA:COMP?")[:2] == pytest.approx([0.2, 0.1], rel=1e-11)
        finally:
            scpi.close()


def test_a_two_port_file_is_refused_as_a_load(tmp_path):
    freq = skrf.Frequency.from_f([1e9, 2e9], unit="Hz")
    skrf.Network(frequency=freq, s=np.zeros((2, 2, 2)), z0=50.0).write_touchstone("thru", dir=tmp_path)
    with pytest.raises(InputFileError, match="one-port"):
        SimulatedAnalyzer(tmp_path / "thru.s2p")


def test_bad_fault_name_is_refused():
    with pytest.raises(ValueError, match="error_on 'trgger'"):
        SimulatedAnalyzer(SeriesRLC(), faults=Faults(error_on="trgger"))


def test_a_message_of_too_many_commands_is_cut_short(scpi):
    scpi.write(";".join(["SENS:SWE:POIN 11"] * 64 + ["SENS:SWE:POIN 12"]))
    assert scpi.query("SENS:SWE:POIN?") == "11"
    assert errors(scpi) == ['-223,"Too much data"']


def test_an_overlong_message_closes_the_connection(sim):
    with socket.create_connection(("127.0.0.1", sim.port), timeout=2) as raw:
        raw.sendall(b"X" * (MAX_MESSAGE_BYTES + 10) + b"\n")
        assert raw.recv(100) == b""


def test_stop_ends_connections_and_stalled_queries_promptly():
    sim = SimulatedAnalyzer(SeriesRLC(), sweep_time_scale=1.0, noise_db=-math.inf).start()
    port = sim.port
    idle = socket.create_connection(("127.0.0.1", port), timeout=2)
    busy = socket.create_connection(("127.0.0.1", port), timeout=2)
    try:
        busy.sendall(b"INIT:CONT OFF;:SENS:BWID 1;:SENS:SWE:POIN 100001;:INIT;*OPC?\n")   # a 28-hour sweep
        time.sleep(0.1)
        started = time.monotonic()
        sim.stop()
        assert time.monotonic() - started < 2.0
        assert busy.recv(10) == b"" and idle.recv(10) == b""
        with pytest.raises(ConnectionRefusedError):
            socket.create_connection(("127.0.0.1", port), timeout=2).close()
        sim.stop()   # idempotent
    finally:
        idle.close()
        busy.close()
