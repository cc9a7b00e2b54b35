"""A simulated analyzer: a SCPI server on 127.0.0.1 for tests and demonstrations.

:class:`SimulatedAnalyzer` listens on a free loopback port (raw TCP, one thread per
connection) and answers in the dialect of ``configs/analyzers/generic-scpi.toml``. Its
load is a one-port Touchstone file (interpolated onto the requested sweep, linear in real
and imaginary part) or a model such as :class:`SeriesRLC`. A triggered sweep takes
``(points / IFBW + overhead) x sweep_time_scale`` seconds; complex Gaussian noise is added
at ``noise_db`` (re |S| = 1). :class:`Faults` injects the failures a real bench shows:
a sweep that is never or late answered, a connection dropped in the middle of a block, a
malformed block header, a block in the wrong byte order, an error in the queue.

The SCPI it understands (headers match in short or long form, any case; the optional
nodes in brackets may be left out; ``#`` is a channel suffix that must be 1 if given):

    *IDN? *RST *CLS *ESR? *OPC? *WAI
    [SENSe#]:FREQuency:STARt|STOP <Hz>[?]      [SENSe#]:SWEep:POINts <n>[?]
    [SENSe#]:BWIDth[:RESolution] <Hz>[?]       [SENSe#]:SWEep:TIME?
    [SENSe#]:FREQuency:DATA?                   CALCulate#:PARameter:SELect S11|S22[?]
    CALCulate#:DATA:COMPlex?                   INITiate#[:IMMediate]
    INITiate#:CONTinuous ON|OFF[?]             FORMat[:DATA] REAL,64|REAL,32|ASCii[?]
    FORMat:BORDer NORMal|SWAPped[?]            SYSTem:ERRor[:NEXT]?

Errors go to a queue of ten with standard SCPI codes (from memory, see
/work/shared/reference/REFERENCES.md §7): -104 Data type error, -109 Missing parameter,
-113 Undefined header, -114 Header suffix out of range, -213 Init ignored, -222 Data out of
range, -223 Too much data, -224 Illegal parameter value, -350 Queue overflow. Replies to several queries in
one message are joined with ';' (IEEE 488.2). Bounded: a message longer than 64 KiB
closes its connection, commands past the 64th of a message are dropped (-223), and
:meth:`stop` ends every connection and thread.
"""

from __future__ import annotations

import contextlib
import math
import os
import re
import socket
import socketserver
import threading
import time
from collections import deque
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import numpy as np

from pipeline.errors import InputFileError

#: Noise level of a typical analyzer trace, dB re |S| = 1 (used when ``noise_db`` is None).
TYPICAL_NOISE_DB = -60.0
#: Time a sweep takes beyond points / IFBW (retrace, settling), s, before scaling.
SWEEP_OVERHEAD_S = 0.01
#: Frequency range of the simulated analyzer when the load is a model, Hz.
MODEL_RANGE_HZ = (100e3, 20e9)
POINTS_RANGE = (2, 100_001)
IFBW_RANGE_HZ = (1.0, 1e6)
MAX_MESSAGE_BYTES = 65536
MAX_COMMANDS_PER_MESSAGE = 64
ERROR_QUEUE_LENGTH = 10
#: Significant digits of ASCII numbers (relative resolution 5e-12).
ASCII_DIGITS = 12
IDENTITY = "matchbay,simulated analyzer,SIM0001,1.0"


@dataclass(frozen=True)
class SeriesRLC:
    """A series R-L-C load to ground: Z = R + jwL + 1/(jwC); S11 = (Z - z0)/(Z + z0).

    Resonant at f0 = 1 / (2 pi sqrt(LC)), where S11 = (R - z0)/(R + z0).
    """

    r_ohm: float = 50.0
    l_h: float = 795.77e-9
    c_f: float = 3.1831e-12
    z0_ohm: float = 50.0

    def __call__(self, freq_hz: np.ndarray) -> np.ndarray:
        omega = 2 * np.pi * np.asarray(freq_hz, dtype=float)
        z = self.r_ohm + 1j * omega * self.l_h + 1 / (1j * omega * self.c_f)
        return (z - self.z0_ohm) / (z + self.z0_ohm)


@dataclass(frozen=True)
class Faults:
    """Failures to inject. Each count fault hits its first ``n`` occurrences, then stops.

    silent_sweeps    : the completion query (*OPC?) after a trigger is never answered.
    late_sweeps      : it is answered ``late_by_s`` after the sweep's end (a timeout, then
                       a late reply that answers the client's next query).
    dropped_blocks   : a trace reply stops half-way and the connection closes.
    malformed_blocks : a trace reply's block header has a length that is not a number.
    swapped_blocks   : a trace reply in the byte order opposite to FORMat:BORDer.
    error_on         : after this command (a name of :data:`NODE_NAMES`, e.g. "trigger"),
                       every time, ``error`` (code, text) is queued.
    """

    silent_sweeps: int = 0
    late_sweeps: int = 0
    late_by_s: float = 1.0
    dropped_blocks: int = 0
    malformed_blocks: int = 0
    swapped_blocks: int = 0
    error_on: str = ""
    error: tuple[int, str] = (-221, "Settings conflict")


_COUNTED_FAULTS = ("silent_sweeps", "late_sweeps", "dropped_blocks", "malformed_blocks", "swapped_blocks")

#: Header patterns of the dialect and the name of the setting or action each addresses.
_TREE = (
    ("[SENSe#]:FREQuency:STARt", "start"),
    ("[SENSe#]:FREQuency:STOP", "stop"),
    ("[SENSe#]:SWEep:POINts", "points"),
    ("[SENSe#]:BWIDth[:RESolution]", "ifbw"),
    ("[SENSe#]:SWEep:TIME", "sweep_time"),
    ("[SENSe#]:FREQuency:DATA", "frequencies"),
    ("CALCulate#:PARameter:SELect", "parameter"),
    ("CALCulate#:DATA:COMPlex", "trace"),
    ("INITiate#[:IMMediate]", "trigger"),
    ("INITiate#:CONTinuous", "continuous"),
    ("FORMat[:DATA]", "data_format"),
    ("FORMat:BORDer", "byte_order"),
    ("SYSTem:ERRor[:NEXT]", "error"),
)
NODE_NAMES = tuple(name for _, name in _TREE)


def _header_regex(pattern: str) -> re.Pattern:
    """``"[SENSe#]:FREQuency:STARt"`` -> a regex for the upper-cased header (no leading ':').

    A mnemonic matches its short form (its capitals) or its long form; ``#`` captures an
    optional numeric suffix; a bracketed node is optional.
    """
    regex, separator = "", ""
    for bracket, word in re.findall(r"(\[)?:?([A-Za-z]+#?)\]?", pattern):
        optional = bool(bracket)
        suffix = r"(\d*)" if word.endswith("#") else ""
        word = word.rstrip("#")
        short = "".join(c for c in word if c.isupper() or c.isdigit())
        node = f"(?:{word.upper()}|{short}){suffix}"
        if optional and not regex:
            regex, separator = f"(?:{node}:)?", ""
            continue
        piece = f"{separator}{node}"
        regex += f"(?:{piece})?" if optional else piece
        separator = ":"
    return re.compile(regex)


_HEADERS = tuple((_header_regex(pattern), name) for pattern, name in _TREE)


class _ScpiError(Exception):
    def __init__(self, code: int, text: str):
        super().__init__(code, text)
        self.code, self.text = code, text


class _Stopping(Exception):
    """The simulator is stopping; the connection ends without a reply."""


class _DropConnection(Exception):
    """Send ``partial`` and close the connection (fault injection)."""

    def __init__(self, partial: bytes):
        super().__init__()
        self.partial = partial


@dataclass
class _Settings:
    start_hz: float
    stop_hz: float
    points: int = 201
    ifbw_hz: float = 10e3
    parameter: str = "S11"
    continuous: bool = True
    data_format: str = "ASCII"      # "REAL,64" | "REAL,32" | "ASCII"
    byte_order: str = "NORM"        # "NORM" (big-endian) | "SWAP" (little-endian)


@dataclass(frozen=True)
class _SweepRecord:
    s11: np.ndarray
    done_at: float                  # time.monotonic() when the sweep completes


class _TouchstoneLoad:
    """S11 of a one-port Touchstone file, interpolated linearly in real and imaginary part."""

    def __init__(self, path: Path):
        import skrf

        try:
            network = skrf.Network(str(path))
        except Exception as error:  # skrf raises bare ValueError/EOFError/TypeError (library-facts §1.7)
            raise InputFileError(f"cannot read the simulated load: {error}", where=str(path)) from None
        if network.nports != 1:
            raise InputFileError(f"the simulated load must be a one-port file, this one has {network.nports} ports",
                                 where=str(path))
        if not np.allclose(network.z0, 50.0):
            network.renormalize(50.0)
        self.freq_hz = network.f
        self.s11 = network.s[:, 0, 0]
        self.range_hz = (float(self.freq_hz[0]), float(self.freq_hz[-1]))

    def __call__(self, freq_hz: np.ndarray) -> np.ndarray:
        return (np.interp(freq_hz, self.freq_hz, self.s11.real)
                + 1j * np.interp(freq_hz, self.freq_hz, self.s11.imag))


class _Instrument:
    """The analyzer's state and dialect, shared by all connections (like a real one)."""

    def __init__(self, load: Callable[[np.ndarray], np.ndarray], range_hz: tuple[float, float], *,
                 sweep_time_scale: float, sweep_overhead_s: float, noise_rms: float,
                 rng: np.random.Generator, faults: Faults):
        self.load, self.range_hz = load, range_hz
        self.sweep_time_scale, self.sweep_overhead_s = sweep_time_scale, sweep_overhead_s
        self.noise_rms, self.rng, self.faults = noise_rms, rng, faults
        self.stopping = threading.Event()
        self.received: deque[str] = deque(maxlen=1000)
        self._lock = threading.RLock()
        self._remaining = {name: getattr(faults, name) for name in _COUNTED_FAULTS}   # left to inject
        self._errors: deque[tuple[int, str]] = deque()
        self._esr = 0
        self._sweep: _SweepRecord | None = None
        self._settings = self._preset()
        self._nodes = {
            "start": (self._get_start, self._set_start),
            "stop": (self._get_stop, self._set_stop),
            "points": (lambda: str(self._settings.points), self._set_points),
            "ifbw": (lambda: _nr3(self._settings.ifbw_hz), self._set_ifbw),
            "sweep_time": (lambda: _nr3(self.sweep_time_s(self._settings.points, self._settings.ifbw_hz)), None),
            "frequencies": (self._get_frequencies, None),
            "parameter": (lambda: self._settings.parameter, self._set_parameter),
            "trace": (self._get_trace, None),
            "trigger": (None, self._trigger),
            "continuous": (lambda: "1" if self._settings.continuous else "0", self._set_continuous),
            "data_format": (lambda: self._settings.data_format, self._set_data_format),
            "byte_order": (lambda: self._settings.byte_order, self._set_byte_order),
            "error": (self._next_error, None),
        }
        self._common = {
            "*IDN?": lambda arg: IDENTITY,
            "*RST": self._reset,
            "*CLS": self._clear_status,
            "*ESR?": self._read_esr,
            "*OPC?": lambda arg: self._wait_for_sweep(with_faults=True),
            "*WAI": self._wai,
        }

    def sweep_time_s(self, points: int, ifbw_hz: float) -> float:
        """How long a sweep of these settings takes here, s."""
        return (points / ifbw_hz + self.sweep_overhead_s) * self.sweep_time_scale

    # -- messages -----------------------------------------------------------------------------

    def handle_message(self, message: str) -> bytes | None:
        """Execute one program message (commands joined by ';'); the reply with its newline."""
        with self._lock:
            self.received.append(message)
        units = message.split(";")
        if len(units) > MAX_COMMANDS_PER_MESSAGE:
            self._push_error(-223, "Too much data")
        replies = []
        for unit in units[:MAX_COMMANDS_PER_MESSAGE]:
            reply = self._execute(unit.strip())
            if reply is not None:
                replies.append(reply if isinstance(reply, bytes) else reply.encode("ascii"))
        return b";".join(replies) + b"\n" if replies else None

    def _execute(self, unit: str) -> str | bytes | None:
        if not unit:
            return None
        header, _, arg = unit.partition(" ")
        arg = arg.strip()
        try:
            if header.startswith("*"):
                action = self._common.get(header.upper())
                if action is None:
                    raise _ScpiError(-113, f"Undefined header;{header}")
                return action(arg)
            name, query = self._lookup(header)
            getter, setter = self._nodes[name]
            handler = getter if query else setter
            if handler is None:
                raise _ScpiError(-113, f"Undefined header;{header}")
            reply = handler() if query else handler(arg)
            if name == self.faults.error_on:
                self._push_error(*self.faults.error)
            return reply
        except _ScpiError as error:
            self._push_error(error.code, error.text)
            return None

    @staticmethod
    def _lookup(header: str) -> tuple[str, bool]:
        """(node name, is a query) for a header, or a -113 / -114 error."""
        query = header.endswith("?")
        path = header.rstrip("?").lstrip(":").upper()
        for regex, name in _HEADERS:
            match = regex.fullmatch(path)
            if match:
                if any(suffix not in ("", "1") for suffix in match.groups() if suffix is not None):
                    raise _ScpiError(-114, f"Header suffix out of range;{header}")
                return name, query
        raise _ScpiError(-113, f"Undefined header;{header}")

    # -- status and errors --------------------------------------------------------------------

    def _push_error(self, code: int, text: str) -> None:
        # IEEE 488.2 event status bits: 32 command, 16 execution, 8 device, 4 query error.
        bit = {1: 32, 2: 16, 3: 8, 4: 4}.get(-code // 100, 8)
        with self._lock:
            self._esr |= bit
            if len(self._errors) >= ERROR_QUEUE_LENGTH:
                self._errors[-1] = (-350, "Queue overflow")
            else:
                self._errors.append((code, text))

    def _next_error(self) -> str:
        with self._lock:
            code, text = self._errors.popleft() if self._errors else (0, "No error")
        return f'{code:+d},"{text}"'

    def _clear_status(self, arg: str = "") -> None:
        with self._lock:
            self._errors.clear()
            self._esr = 0

    def _read_esr(self, arg: str) -> str:
        with self._lock:
            value, self._esr = self._esr, 0
        return str(value)

    def _preset(self) -> _Settings:
        return _Settings(start_hz=self.range_hz[0], stop_hz=self.range_hz[1])

    def _reset(self, arg: str) -> None:
        with self._lock:
            self._settings = self._preset()
            self._sweep = None

    # -- settings -----------------------------------------------------------------------------

    def _frequency(self, arg: str) -> float:
        value = _number(arg)
        if not self.range_hz[0] <= value <= self.range_hz[1]:
            raise _ScpiError(-222, "Data out of range")
        return value

    def _get_start(self) -> str:
        return _nr3(self._settings.start_hz)

    def _get_stop(self) -> str:
        return _nr3(self._settings.stop_hz)

    def _set_start(self, arg: str) -> None:
        value = self._frequency(arg)
        with self._lock:   # like most analyzers, moving start past stop drags stop along
            self._settings.start_hz = value
            self._settings.stop_hz = max(self._settings.stop_hz, value)

    def _set_stop(self, arg: str) -> None:
        value = self._frequency(arg)
        with self._lock:
            self._settings.stop_hz = value
            self._settings.start_hz = min(self._settings.start_hz, value)

    def _set_points(self, arg: str) -> None:
        value = round(_number(arg))
        if not POINTS_RANGE[0] <= value <= POINTS_RANGE[1]:
            raise _ScpiError(-222, "Data out of range")
        with self._lock:
            self._settings.points = value

    def _set_ifbw(self, arg: str) -> None:
        value = _number(arg)
        if not IFBW_RANGE_HZ[0] <= value <= IFBW_RANGE_HZ[1]:
            raise _ScpiError(-222, "Data out of range")
        with self._lock:
            self._settings.ifbw_hz = value

    def _set_parameter(self, arg: str) -> None:
        self._settings.parameter = _choice(arg, {"S11": "S11", "S22": "S22"})

    def _set_continuous(self, arg: str) -> None:
        self._settings.continuous = _choice(arg, {"ON": True, "1": True, "OFF": False, "0": False})

    def _set_data_format(self, arg: str) -> None:
        self._settings.data_format = _choice(arg.replace(" ", ""), {
            "REAL,64": "REAL,64", "REAL": "REAL,64", "REAL,32": "REAL,32", "ASC": "ASCII", "ASCII": "ASCII"})

    def _set_byte_order(self, arg: str) -> None:
        self._settings.byte_order = _choice(arg, {"NORM": "NORM", "NORMAL": "NORM", "SWAP": "SWAP",
                                                  "SWAPPED": "SWAP"})

    # -- sweeping and data --------------------------------------------------------------------

    def _linear_frequencies(self) -> np.ndarray:
        s = self._settings
        return np.linspace(s.start_hz, s.stop_hz, s.points)

    def _trigger(self, arg: str) -> None:
        with self._lock:
            if self._settings.continuous:
                raise _ScpiError(-213, "Init ignored")
            self._sweep = self._measure()

    def _measure(self) -> _SweepRecord:
        freq_hz = self._linear_frequencies()
        s11 = self.load(freq_hz)
        if self.noise_rms > 0:
            noise = self.rng.normal(scale=self.noise_rms / math.sqrt(2), size=(2, freq_hz.size))
            s11 = s11 + noise[0] + 1j * noise[1]
        delay = self.sweep_time_s(self._settings.points, self._settings.ifbw_hz)
        return _SweepRecord(s11=s11, done_at=time.monotonic() + delay)

    def _take_fault(self, name: str) -> bool:
        with self._lock:
            if self._remaining[name] > 0:
                self._remaining[name] -= 1
                return True
            return False

    def _wait_until(self, moment: float) -> None:
        remaining = moment - time.monotonic()
        if remaining > 0 and self.stopping.wait(remaining):
            raise _Stopping()

    def _wait_for_sweep(self, *, with_faults: bool) -> str | None:
        with self._lock:
            sweep = self._sweep
        if sweep is None:
            return "1"
        done_at = sweep.done_at
        if with_faults and self._take_fault("silent_sweeps"):
            return None
        if with_faults and self._take_fault("late_sweeps"):
            done_at += self.faults.late_by_s
        self._wait_until(done_at)
        return "1"

    def _wai(self, arg: str) -> None:
        """*WAI: hold further commands until the sweep is complete (no reply)."""
        self._wait_for_sweep(with_faults=False)

    def _last_sweep(self) -> _SweepRecord:
        """The latest sweep, once complete (an analyzer that was never triggered has one too)."""
        with self._lock:
            if self._sweep is None:
                self._sweep = self._measure()
            sweep = self._sweep
        self._wait_until(sweep.done_at)
        return sweep

    def _get_frequencies(self) -> bytes:
        with self._lock:
            return self._encode(self._linear_frequencies(), swapped=False)

    def _get_trace(self) -> bytes:
        sweep = self._last_sweep()
        interleaved = np.column_stack([sweep.s11.real, sweep.s11.imag]).ravel()
        with self._lock:
            binary = self._settings.data_format != "ASCII"
            block = self._encode(interleaved, swapped=binary and self._take_fault("swapped_blocks"))
        if binary and self._take_fault("malformed_blocks"):
            digits = int(block[1:2])
            block = b"#" + block[1:2] + b"Z" * digits + block[2 + digits:]
        if self._take_fault("dropped_blocks"):
            raise _DropConnection(block[: len(block) // 2])
        return block

    def _encode(self, values: np.ndarray, *, swapped: bool) -> bytes:
        """Numbers in the current data format: a definite-length block, or ASCII."""
        s = self._settings
        if s.data_format == "ASCII":
            return ",".join(f"{v:.{ASCII_DIGITS - 1}e}" for v in values).encode("ascii")
        big = (s.byte_order == "NORM") != swapped
        dtype = (">" if big else "<") + ("f8" if s.data_format == "REAL,64" else "f4")
        payload = values.astype(dtype).tobytes()
        length = str(len(payload)).encode("ascii")
        return b"#" + str(len(length)).encode("ascii") + length + payload


def _number(arg: str) -> float:
    if not arg:
        raise _ScpiError(-109, "Missing parameter")
    try:
        value = float(arg)
    except ValueError:
        raise _ScpiError(-104, "Data type error") from None
    if not math.isfinite(value):
        raise _ScpiError(-222, "Data out of range")
    return value


def _choice(arg: str, choices: dict):
    if not arg:
        raise _ScpiError(-109, "Missing parameter")
    try:
        return choices[arg.upper()]
    except KeyError:
        raise _ScpiError(-224, "Illegal parameter value") from None


def _nr3(value: float) -> str:
    return f"{value:.{ASCII_DIGITS - 1}e}"


class _Connection(socketserver.StreamRequestHandler):
    """One client connection: read a line, execute it, reply; until EOF or stop."""

    def setup(self) -> None:
        super().setup()
        self.request.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
        self.server.track(self.request)

    def handle(self) -> None:
        instrument: _Instrument = self.server.instrument
        while True:
            try:
                line = self.rfile.readline(MAX_MESSAGE_BYTES + 1)
                if not line.endswith(b"\n"):   # closed, stopping, or a message too long
                    return
                reply = instrument.handle_message(line.decode("latin-1").rstrip("\r\n"))
                if reply:
                    self.wfile.write(reply)
            except _DropConnection as drop:
                with contextlib.suppress(OSError):
                    self.wfile.write(drop.partial)
                return
            except (_Stopping, OSError):
                return

    def finish(self) -> None:
        self.server.untrack(self.request)
        try:
            super().finish()
        except OSError:
            pass


class _Server(socketserver.ThreadingTCPServer):
    """One daemon thread per connection (a forgotten simulator never blocks the interpreter's
    exit), each tracked so that :meth:`join_threads` can wait for them: socketserver itself
    joins only non-daemon threads."""

    block_on_close = False

    def __init__(self, instrument: _Instrument):
        super().__init__(("127.0.0.1", 0), _Connection)
        self.instrument = instrument
        self._connections: set[socket.socket] = set()
        self._connection_threads: list[threading.Thread] = []
        self._connections_lock = threading.Lock()

    def process_request(self, request, client_address) -> None:
        thread = threading.Thread(target=self.process_request_thread, args=(request, client_address),
                                  name=f"simulated-analyzer-connection-{client_address[1]}", daemon=True)
        with self._connections_lock:
            self._connection_threads = [t for t in self._connection_threads if t.is_alive()] + [thread]
        thread.start()

    def join_threads(self) -> None:
        with self._connections_lock:
            threads, self._connection_threads = self._connection_threads, []
        for thread in threads:
            thread.join()

    def track(self, connection: socket.socket) -> None:
        with self._connections_lock:
            self._connections.add(connection)

    def untrack(self, connection: socket.socket) -> None:
        with self._connections_lock:
            self._connections.discard(connection)

    def end_connections(self) -> None:
        """Wake every connection thread blocked in a read, so it ends."""
        with self._connections_lock:
            connections = list(self._connections)
        for connection in connections:
            try:
                connection.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass


class SimulatedAnalyzer:
    """A simulated analyzer serving ``load`` on ``127.0.0.1`` at a free port.

    load             : a one-port Touchstone path, or a callable ``f_hz -> S11`` (e.g. SeriesRLC).
    sweep_time_scale : factor on the realistic sweep time (points / IFBW + overhead); 0 = instant.
    sweep_overhead_s : the overhead in that sum, s.
    noise_db         : complex noise, dB re |S| = 1; None = :data:`TYPICAL_NOISE_DB`; -inf = none.
    faults           : :class:`Faults` to inject.
    freq_range_hz    : the analyzer's frequency range; default the file's range, or
                       :data:`MODEL_RANGE_HZ` for a model (outside it: -222 Data out of range).
    seed             : seed of the noise generator.

    Use as a context manager, or call :meth:`start` / :meth:`stop`.
    """

    def __init__(self, load: str | os.PathLike | Callable[[np.ndarray], np.ndarray], *,
                 sweep_time_scale: float = 1.0, sweep_overhead_s: float = SWEEP_OVERHEAD_S,
                 noise_db: float | None = None, faults: Faults | None = None,
                 freq_range_hz: tuple[float, float] | None = None, seed: int | None = None):
        if isinstance(load, (str, os.PathLike)):
            model = _TouchstoneLoad(Path(load))
            default_range = model.range_hz
        elif callable(load):
            model, default_range = load, MODEL_RANGE_HZ
        else:
            raise TypeError(f"load must be a Touchstone path or a callable f_hz -> S11, not {load!r}")
        faults = faults or Faults()
        if faults.error_on and faults.error_on not in NODE_NAMES:
            raise ValueError(f"Faults.error_on {faults.error_on!r}: use one of {', '.join(NODE_NAMES)}")
        if not sweep_time_scale >= 0 or not sweep_overhead_s >= 0:
            raise ValueError("sweep_time_scale and sweep_overhead_s must be >= 0")
        level_db = TYPICAL_NOISE_DB if noise_db is None else noise_db
        self._instrument = _Instrument(
            model, freq_range_hz or default_range, sweep_time_scale=sweep_time_scale,
            sweep_overhead_s=sweep_overhead_s, noise_rms=10 ** (level_db / 20),
            rng=np.random.default_rng(seed), faults=faults)
        self._server: _Server | None = None
        self._thread: threading.Thread | None = None

    @property
    def port(self) -> int:
        if self._server is None:
            raise RuntimeError("the simulated analyzer is not running")
        return self._server.server_address[1]

    @property
    def resource(self) -> str:
        """The VISA resource string to open, e.g. ``"TCPIP::127.0.0.1::40123::SOCKET"``."""
        return f"TCPIP::127.0.0.1::{self.port}::SOCKET"

    @property
    def received(self) -> list[str]:
        """The last (up to 1000) program messages received, as sent (without termination)."""
        with self._instrument._lock:
            return list(self._instrument.received)

    def sweep_time_s(self, points: int, ifbw_hz: float) -> float:
        """How long one sweep of these settings takes on this simulator, s."""
        return self._instrument.sweep_time_s(points, ifbw_hz)

    def start(self) -> "SimulatedAnalyzer":
        if self._server is None:
            self._instrument.stopping.clear()
            self._server = _Server(self._instrument)
            self._thread = threading.Thread(target=self._server.serve_forever, kwargs={"poll_interval": 0.05},
                                            name=f"simulated-analyzer-{self.port}", daemon=True)
            self._thread.start()
        return self

    def stop(self) -> None:
        """Stop serving, end every connection and join every thread (idempotent)."""
        if self._server is None:
            return
        server, self._server = self._server, None
        self._instrument.stopping.set()
        server.shutdown()
        server.end_connections()
        server.server_close()
        server.join_threads()
        self._thread.join()
        self._thread = None

    def __enter__(self) -> "SimulatedAnalyzer":
        return self.start()

    def __exit__(self, *exc) -> None:
        self.stop()
