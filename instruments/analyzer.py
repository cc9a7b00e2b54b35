"""Acquire one reflection sweep from a live analyzer through a profile.

:meth:`Analyzer.acquire` runs these steps, each named in any error it raises
(``"step 'read trace': ..."``), and reads the analyzer's error queue after every one:

    prepare            clear status, single-sweep mode
    set frequency range, set points, set IF bandwidth, select parameter, set data format
    read sweep time    (if the profile has the query; else points / IF bandwidth)
    trigger sweep
    wait for sweep     the profile's completion query (*OPC?) under a timeout of
                       sweep_time_factor x expected sweep time + io timeout
    read trace         an IEEE 488.2 binary block (REAL,64 / REAL,32, either byte order)
                       or ASCII; checked for point count, finiteness and |S| <= 1.5
    read frequencies   (if the profile says "query"; else a linear grid)

A link failure (timeout, refused or dropped connection, garbled reply) is retried
``retries`` times: first on the same connection (discard stale input, then a known-answer
query, since a late reply would otherwise answer every later query one step out of
turn), else by reconnecting; the whole acquisition is then redone. An error the analyzer
itself reports, or implausible data, is not retried. On failure nothing is returned, the
session is closed, and an :class:`~pipeline.errors.InstrumentError` names the step.

The result is a :class:`~pipeline.sweep.Sweep`, the same object a Touchstone file gives.
``acquire`` never resets the analyzer: a preset would switch its calibration off.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import re
import tempfile
from contextlib import contextmanager
from dataclasses import asdict, dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Iterator

import numpy as np

from instruments.profile import BYTE_ORDERS, DATA_FORMATS, Profile
from instruments.visa import DEFAULT_VISA_LIBRARY, LinkError, VisaSession
from pipeline.errors import ConfigError, InputFileError, InstrumentError
from pipeline.sweep import Provenance, Sweep

log = logging.getLogger(__name__)

#: Largest believable |S11|. A passive load gives <= 1; the margin covers calibration
#: error and noise. A wrong byte order decodes to finite garbage far above it (library-facts §3.2).
PLAUSIBLE_REFLECTION = 1.5
#: Error queue entries read after one step at most (a flooded queue must not loop forever).
MAX_ERRORS_READ = 20
#: Replies skipped at most while looking for the known answer during recovery.
MAX_STALE_REPLIES = 4
_ERROR_REPLY = re.compile(r'^\s*([+-]?\d+)\s*,\s*"?(.*?)"?\s*$')


@dataclass(frozen=True)
class SweepSettings:
    """What one acquisition asks of the analyzer (SI units). Raises ConfigError when invalid."""

    start_hz: float
    stop_hz: float
    points: int
    ifbw_hz: float
    port: int = 1
    data_format: str = "REAL,64"
    byte_order: str = "little"

    def __post_init__(self):
        if not (np.isfinite(self.start_hz) and self.start_hz > 0 and self.stop_hz > self.start_hz
                and np.isfinite(self.stop_hz)):
            raise ConfigError(f"sweep {self.start_hz!r} to {self.stop_hz!r} Hz: need 0 < start < stop")
        if isinstance(self.points, bool) or int(self.points) != self.points or self.points < 2:
            raise ConfigError(f"points {self.points!r}: need a whole number >= 2")
        if not (np.isfinite(self.ifbw_hz) and self.ifbw_hz > 0):
            raise ConfigError(f"IF bandwidth {self.ifbw_hz!r} Hz: must be positive")
        if self.port not in (1, 2):
            raise ConfigError(f"port {self.port!r}: the reflection is measured at port 1 or 2")
        if self.data_format not in DATA_FORMATS:
            raise ConfigError(f"data format {self.data_format!r}: use one of {', '.join(DATA_FORMATS)}")
        if self.byte_order not in BYTE_ORDERS:
            raise ConfigError(f"byte order {self.byte_order!r}: use one of {', '.join(BYTE_ORDERS)}")
        object.__setattr__(self, "points", int(self.points))

    @property
    def parameter(self) -> str:
        """The reflection parameter measured: S11 at port 1, S22 at port 2."""
        return f"S{self.port}{self.port}"

    @property
    def binary(self) -> bool:
        return DATA_FORMATS[self.data_format] is not None

    def linear_frequencies(self) -> np.ndarray:
        """The frequency grid a linear sweep of these settings covers, Hz."""
        return np.linspace(self.start_hz, self.stop_hz, self.points)

    def template_values(self) -> dict:
        """The placeholders of profile command templates."""
        return {"start_hz": float(self.start_hz), "stop_hz": float(self.stop_hz), "points": self.points,
                "ifbw_hz": float(self.ifbw_hz), "parameter": self.parameter, "port": self.port}


class Analyzer:
    """A live analyzer reached through VISA and spoken to in a profile's dialect.

    resource     : VISA resource string, e.g. ``"TCPIP::192.168.0.20::5025::SOCKET"``.
    profile      : the analyzer's :class:`~instruments.profile.Profile`.
    visa_library : ``"@py"`` (pyvisa-py, the default), ``""`` (a system VISA library if
                   installed, else pyvisa-py), or a library path.
    timeout_s    : timeout for one ordinary reply, s (default: the profile's io_timeout_s).
    retries      : how many times a failed acquisition is recovered and redone.

    Use it as a context manager; the session opens on entry (with an identity query as a
    liveness check) and closes on exit. After a failure it reopens on the next call.
    """

    def __init__(self, resource: str, profile: Profile, *, visa_library: str = DEFAULT_VISA_LIBRARY,
                 timeout_s: float | None = None, retries: int = 1):
        if isinstance(retries, bool) or not isinstance(retries, int) or retries < 0:
            raise ConfigError(f"retries {retries!r}: need a whole number >= 0")
        if timeout_s is not None and not timeout_s > 0:
            raise ConfigError(f"timeout {timeout_s!r} s: must be positive")
        self.resource = resource
        self.profile = profile
        self.visa_library = visa_library
        self.timeout_s = float(timeout_s) if timeout_s is not None else profile.io_timeout_s
        self.retries = retries
        self.identity = ""
        self._session: VisaSession | None = None

    # -- session ----------------------------------------------------------------------------

    def __enter__(self) -> "Analyzer":
        self.open()
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def open(self) -> None:
        """Connect (if not connected) and read the identity; InstrumentError if nobody answers."""
        if self._session is not None:
            return
        with self._step("connect"):
            session = VisaSession(self.resource, visa_library=self.visa_library, timeout_s=self.timeout_s,
                                  read_termination=self.profile.read_termination,
                                  write_termination=self.profile.write_termination)
            try:
                identity = session.query(self.profile.command("identify"))
                if not identity:
                    raise LinkError("empty reply to the identity query")
                if self.identity and identity != self.identity:
                    raise InstrumentError(f"another instrument answers now: {identity!r}, "
                                          f"was {self.identity!r}")
            except InstrumentError:
                session.close()
                raise
        self._session, self.identity = session, identity
        log.debug("%s: connected to %s (TCP_NODELAY %s)", self.resource, identity, session.nodelay)

    @property
    def connected(self) -> bool:
        """Whether a session is open (it closes after a failed acquisition)."""
        return self._session is not None

    def close(self) -> None:
        """Close the session (idempotent)."""
        if self._session is not None:
            self._session.close()
            self._session = None

    def identify(self) -> str:
        """The analyzer's identity string (the reply to the profile's identify query)."""
        self.open()
        with self._closed_on_failure(), self._step("identify"):
            self.identity = self._session.query(self.profile.command("identify"))
        return self.identity

    def reset(self) -> None:
        """Preset the analyzer (the profile's reset command). This also drops its calibration."""
        self.open()
        with self._closed_on_failure():
            self._run_step("reset", [self.profile.command("reset")])

    @contextmanager
    def _closed_on_failure(self) -> Iterator[None]:
        """Close the session when the block fails: a failed conversation may be out of step."""
        try:
            yield
        except InstrumentError:
            self.close()
            raise

    # -- acquisition --------------------------------------------------------------------------

    def acquire(self, start_hz: float, stop_hz: float, points: int, ifbw_hz: float, port: int = 1,
                data_format: str | None = None, byte_order: str | None = None, dut_id: str = "",
                lot: str = "") -> Sweep:
        """Measure one sweep of the reflection at ``port`` and return it as a Sweep.

        start_hz, stop_hz : sweep limits, Hz.      points : number of points (>= 2).
        ifbw_hz           : IF bandwidth, Hz.      port   : 1 (S11) or 2 (S22).
        data_format       : "REAL,64", "REAL,32" or "ASCII"; None: the profile's first.
        byte_order        : "little" or "big" (binary formats only); None: the profile's first.
        dut_id, lot       : recorded in the provenance.

        Raises ConfigError for settings the profile cannot serve, InstrumentError (naming
        the step) when the measurement fails; nothing is returned then.
        """
        settings = SweepSettings(start_hz, stop_hz, points, ifbw_hz, port,
                                 data_format or next(iter(self.profile.data_formats)),
                                 byte_order or next(iter(self.profile.byte_orders), "little"))
        self.profile.check_supports(settings.data_format, settings.byte_order)
        attempts = self.retries + 1
        for attempt in range(1, attempts + 1):
            try:
                self.open()
                freq_hz, s11, sweep_time_s, acquired_at = self._acquire_once(settings)
                break
            except LinkError as fault:
                log.warning("%s: attempt %d of %d failed: %s", self.resource, attempt, attempts, fault.message)
                if attempt == attempts:
                    self.close()
                    tries = f" (gave up after {attempts} attempts)" if attempts > 1 else ""
                    raise InstrumentError(fault.message + tries, where=self.resource) from None
                self._recover(fault)
            except InstrumentError:
                self.close()
                raise
        provenance = Provenance(dut_id=dut_id, lot=lot, source=self.resource,
                                source_sha256=_content_sha256(freq_hz, s11), acquired_at=acquired_at,
                                port=settings.port, instrument=self._record(settings, sweep_time_s, attempt))
        return Sweep(freq_hz, s11, z0_ohm=self.profile.z0_ohm, provenance=provenance)

    def _record(self, settings: SweepSettings, sweep_time_s: float, attempts: int) -> dict:
        """``Provenance.instrument``: who measured, through which profile, with what settings."""
        record = {"identity": self.identity, "resource": self.resource, "profile": self.profile.name,
                  "profile_sha256": self.profile.sha256, **asdict(settings), "parameter": settings.parameter,
                  "sweep_time_s": sweep_time_s, "frequencies": self.profile.frequencies, "attempts": attempts}
        if not settings.binary:
            del record["byte_order"]   # meaningless for text
        return record

    def _acquire_once(self, settings: SweepSettings) -> tuple[np.ndarray, np.ndarray, float, str]:
        """One pass through the steps; returns (freq_hz, s11, sweep_time_s, acquired_at)."""
        p, values = self.profile, settings.template_values()
        self._run_step("prepare", [p.command("clear_status")]
                       + ([p.command("single_sweep_mode")] if p.has("single_sweep_mode") else []))
        self._run_step("set frequency range", [p.command("set_start", **values), p.command("set_stop", **values)])
        self._run_step("set points", [p.command("set_points", **values)])
        self._run_step("set IF bandwidth", [p.command("set_ifbw", **values)])
        self._run_step("select parameter", [p.command("select_parameter", **values)])
        order = p.byte_orders.get(settings.byte_order, "") if settings.binary else ""
        self._run_step("set data format", [p.data_formats[settings.data_format]] + ([order] if order else []))
        sweep_time_s = self._sweep_time(settings)
        acquired_at = datetime.now(timezone.utc).isoformat(timespec="milliseconds")
        self._run_step("trigger sweep", [p.command("trigger")])
        self._wait_for_sweep(sweep_time_s)
        with self._step("read trace"):
            trace = self._read_values(p.command("read_trace"), settings, 2 * settings.points)
            with np.errstate(invalid="ignore"):   # a garbled float32 may be a signalling NaN
                s11 = np.ascontiguousarray(trace, dtype=float).view(complex)   # (re, im) pairs
            _check_trace(s11)
        if p.frequencies == "query":
            with self._step("read frequencies"):
                freq_hz = self._read_values(p.command("read_frequencies"), settings, settings.points)
                _check_frequencies(freq_hz, settings)
        else:
            freq_hz = settings.linear_frequencies()
        return np.array(freq_hz, dtype=float), s11, sweep_time_s, acquired_at

    def _sweep_time(self, settings: SweepSettings) -> float:
        """Expected sweep time, s: the analyzer's own figure if the profile can ask for it."""
        if not self.profile.has("sweep_time"):
            return settings.points / settings.ifbw_hz
        with self._step("read sweep time"):
            reply = self._session.query(self.profile.command("sweep_time"))
            self._check_errors()
            try:
                seconds = float(reply)
            except ValueError:
                raise LinkError(f"expected a number of seconds, got {reply[:40]!r}") from None
            if not (np.isfinite(seconds) and seconds >= 0):
                raise InstrumentError(f"implausible sweep time {reply!r}")
            return seconds

    def _wait_for_sweep(self, sweep_time_s: float) -> None:
        """Wait for the completion query's "1" under a timeout scaled to the sweep."""
        limit_s = self.profile.sweep_time_factor * sweep_time_s + self.timeout_s
        command = self.profile.command("wait")
        with self._step("wait for sweep"):
            try:
                with self._session.timeout(limit_s):
                    reply = self._session.query(command)
            except LinkError as fault:
                raise LinkError(f"{fault.message} (query {command}, expected sweep time {sweep_time_s:.3g} s)",
                                dead=fault.dead) from None
            if reply.lstrip("+") != "1":
                raise LinkError(f"expected 1 from {command}, got {reply[:40]!r} (replies out of step?)")
            self._check_errors()

    def _read_values(self, command: str, settings: SweepSettings, count: int) -> np.ndarray:
        """Read ``count`` numbers in the settings' data format; an error if the count differs."""
        if settings.binary:
            values = self._session.query_binary(
                command, datatype=DATA_FORMATS[settings.data_format], big_endian=settings.byte_order == "big",
                count=count, terminated=self.profile.block_terminated)
        else:
            values = self._session.query_ascii(command)
        self._check_errors()
        if values.size != count:
            raise InstrumentError(f"expected {count} values, got {values.size}")
        return values

    # -- steps, errors, recovery --------------------------------------------------------------

    @contextmanager
    def _step(self, name: str) -> Iterator[None]:
        """Prefix any InstrumentError raised inside with the step's name and the resource."""
        try:
            yield
        except LinkError as fault:
            raise LinkError(f"step '{name}': {fault.message}", where=self.resource, dead=fault.dead) from None
        except InstrumentError as error:
            raise InstrumentError(f"step '{name}': {error.message}", where=self.resource) from None

    def _run_step(self, name: str, commands: list[str]) -> None:
        """Send a step's commands (one joined write, or one write each), then check errors."""
        with self._step(name):
            read_error = self.profile.command("read_error")
            if self.profile.join_commands:
                self._raise_reported(self._session.query(";".join(commands + [read_error])))
            else:
                for command in commands:
                    self._session.write(command)
                self._check_errors()

    def _check_errors(self) -> None:
        """Read the error queue once; raise with the analyzer's own text if it holds an error."""
        self._raise_reported(self._session.query(self.profile.command("read_error")))

    def _raise_reported(self, reply: str) -> None:
        code, text = _parse_error(reply)
        if code == 0:
            return
        reported = [f'{code},"{text}"']
        for _ in range(MAX_ERRORS_READ - 1):   # empty the queue so the next step starts clean
            code, text = _parse_error(self._session.query(self.profile.command("read_error")))
            if code == 0:
                break
            reported.append(f'{code},"{text}"')
        more = f" (then {'; '.join(reported[1:])})" if len(reported) > 1 else ""
        raise InstrumentError(f"the analyzer reported {reported[0]}{more}")

    def _recover(self, fault: LinkError) -> None:
        """Bring the conversation back in step after a link failure, reconnecting if need be."""
        if self._session is not None and not fault.dead:
            try:
                with self._step("recover"):
                    self._session.discard_input()
                    self._await_known_answer()
                log.info("%s: back in step after a known-answer query", self.resource)
                return
            except LinkError as failure:
                fault = failure
        log.info("%s: reconnecting (%s)", self.resource, fault.message)
        self.close()

    def _await_known_answer(self) -> None:
        """Ask for the identity and skip late replies until it comes back."""
        reply, skipped = self._session.query(self.profile.command("identify")), 0
        while reply != self.identity:
            if skipped == MAX_STALE_REPLIES:
                raise LinkError(f"the identity query did not come back after {MAX_STALE_REPLIES} other replies")
            log.info("%s: skipped a late reply %r", self.resource, reply[:40])
            reply, skipped = self._session.read(), skipped + 1


def _parse_error(reply: str) -> tuple[int, str]:
    """``'-113,"Undefined header"'`` -> ``(-113, 'Undefined header')``."""
    match = _ERROR_REPLY.match(reply)
    if not match:
        raise LinkError(f"unexpected reply to the error query: {reply[:60]!r} (replies out of step?)")
    return int(match.group(1)), match.group(2)


def _check_trace(s11: np.ndarray) -> None:
    if not np.all(np.isfinite(s11)):
        raise InstrumentError("the trace holds NaN or infinite values (wrong data format or byte order?)")
    worst = float(np.max(np.abs(s11)))
    if worst > PLAUSIBLE_REFLECTION:
        raise InstrumentError(f"implausible |S| up to {worst:.3g} (more than {PLAUSIBLE_REFLECTION}): "
                              "the byte order or data format does not match what the analyzer sends")


def _check_frequencies(freq_hz: np.ndarray, settings: SweepSettings) -> None:
    """The analyzer's list must be finite, rising, and span what was asked (to half a step)."""
    if not (np.all(np.isfinite(freq_hz)) and np.all(np.diff(freq_hz) > 0)):
        raise InstrumentError("the frequency list is not finite and rising (wrong data format or byte order?)")
    tolerance = 0.5 * (settings.stop_hz - settings.start_hz) / (settings.points - 1)
    if abs(freq_hz[0] - settings.start_hz) > tolerance or abs(freq_hz[-1] - settings.stop_hz) > tolerance:
        raise InstrumentError(f"the analyzer swept {freq_hz[0]:.9g} to {freq_hz[-1]:.9g} Hz, "
                              f"not {settings.start_hz:.9g} to {settings.stop_hz:.9g} Hz as asked")


def _content_sha256(freq_hz: np.ndarray, s11: np.ndarray) -> str:
    """A live sweep has no source file; its identity is the hash of the data (float64 LE)."""
    digest = hashlib.sha256(np.ascontiguousarray(freq_hz, dtype="<f8").tobytes())
    digest.update(np.ascontiguousarray(s11, dtype="<c16").tobytes())
    return digest.hexdigest()


def save_touchstone(sweep: Sweep, path: str | Path) -> Path:
    """Write ``sweep`` as a one-port Touchstone file (.s1p, RI, Hz, full precision), atomically.

    The text is written to a hidden ``.part`` file beside ``path``, flushed to disk, then
    renamed over ``path``: a reader (or the folder watcher) never sees half a file. The
    provenance goes into ``!`` comment lines.
    """
    path = Path(path)
    if path.suffix.lower() != ".s1p":
        raise ConfigError("a one-port Touchstone file must have the .s1p extension", where=str(path))
    network = sweep.to_network()
    network.comments = _provenance_comments(sweep)
    text = network.write_touchstone(return_string=True, skrf_comment=False)
    part = None
    try:
        with tempfile.NamedTemporaryFile("w", encoding="utf-8", dir=path.parent, prefix=f".{path.name}.",
                                         suffix=".part", delete=False) as handle:
            part = Path(handle.name)
            handle.write(text)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(part, path)
    except OSError as error:
        if part is not None:
            part.unlink(missing_ok=True)
        raise InputFileError(f"cannot write: {error.strerror or error}", where=str(path)) from None
    return path


def _provenance_comments(sweep: Sweep) -> str:
    prov = sweep.provenance
    lines = ["matchbay live acquisition", f"dut_id: {prov.dut_id}", f"lot: {prov.lot}",
             f"acquired_at: {prov.acquired_at}", f"source: {prov.source}",
             f"instrument: {json.dumps(prov.instrument, sort_keys=True)}"]
    return "\n".join(line.replace("\n", " ") for line in lines)
