"""One conversation with an analyzer over VISA (pyvisa; the pure-Python pyvisa-py by default).

:class:`VisaSession` wraps a pyvisa message-based resource with what every analyzer
conversation here needs: timeouts in seconds, termination characters from the profile,
``TCP_NODELAY`` on raw sockets, and every transport failure turned into a
:class:`LinkError` with a plain message. Nothing here knows SCPI commands; that is the
profile's job.

Facts this module rests on (measured, /work/shared/notes/library-facts.md §3):

* pyvisa-py leaves Nagle's algorithm on for ``TCPIP::host::port::SOCKET`` resources, so a
  write followed by a query waits ~44 ms for a delayed ACK, and its
  ``VI_ATTR_TCPIP_NODELAY`` setter is not wired up (``UnknownAttribute``). The socket is
  reachable only through a private attribute (``visalib.sessions[session].interface``); we
  use it for ``TCP_NODELAY`` and for a bounded input drain, and fall back to the public API
  when it is absent (other backends, other interfaces).
* Opening a SOCKET resource where nothing listens succeeds on pyvisa-py; the first I/O then
  raises ``ConnectionRefusedError``. A dropped connection shows up as a timeout (the socket
  reads empty until the deadline). Callers therefore check liveness with a query at once.
* A reply that arrives after a timeout stays in the input and answers the *next* query.
* pyvisa-py's ``clear()`` loops forever on a socket the peer has closed (it reads until
  0.1 s of silence, and a closed socket is always readable), hence :meth:`discard_input`.
"""

from __future__ import annotations

import select
import socket
import time
from contextlib import contextmanager
from typing import Iterator

import numpy as np
import pyvisa
from pyvisa import constants
from pyvisa.errors import InvalidBinaryFormat, VisaIOError

from pipeline.errors import InstrumentError

#: The pure-Python backend; "" lets pyvisa pick a system VISA library if one is installed.
DEFAULT_VISA_LIBRARY = "@py"
#: How long :meth:`VisaSession.discard_input` keeps reading before it gives up, s.
DRAIN_LIMIT_S = 2.0
#: Silence that ends :meth:`VisaSession.discard_input`, s.
DRAIN_QUIET_S = 0.1


class LinkError(InstrumentError):
    """The link to the analyzer failed: refused, closed, timed out, or a garbled reply.

    A link error says nothing about the measurement itself, so it is worth a retry after
    recovery. ``dead`` is True when the session cannot be used any more and must be reopened.
    """

    def __init__(self, message: str, *, where: str | None = None, dead: bool = False):
        super().__init__(message, where=where)
        self.dead = dead


class VisaSession:
    """An open message-based VISA resource (a raw socket, VXI-11, HiSLIP, USBTMC, GPIB...).

    resource      : VISA resource string, e.g. ``"TCPIP::192.168.0.20::5025::SOCKET"``.
    visa_library  : ``"@py"`` (pyvisa-py), ``""`` (a system VISA if found, else pyvisa-py),
                    or a library path / ``"path@ivi"``.
    timeout_s     : timeout for one reply, s.
    """

    def __init__(self, resource: str, *, visa_library: str = DEFAULT_VISA_LIBRARY, timeout_s: float,
                 read_termination: str, write_termination: str):
        self.resource = resource
        try:
            manager = pyvisa.ResourceManager(visa_library)
        except (OSError, ValueError) as error:
            raise InstrumentError(f"cannot load the VISA library {visa_library!r}: {error}",
                                  where=resource) from None
        timeout_ms = _milliseconds(timeout_s)
        try:
            self._resource = manager.open_resource(
                resource, read_termination=read_termination, write_termination=write_termination,
                timeout=timeout_ms, open_timeout=timeout_ms)
        except Exception as error:  # pyvisa-py raises a bare Exception("could not connect: ...")
            raise LinkError(f"cannot open the connection: {error}", where=resource, dead=True) from None
        self._socket = _raw_socket(self._resource)
        self.nodelay = self.set_nodelay(True)

    # -- settings ---------------------------------------------------------------------------

    @property
    def timeout_s(self) -> float:
        return self._resource.timeout / 1000.0

    @contextmanager
    def timeout(self, seconds: float) -> Iterator[None]:
        """Use another reply timeout inside the block (e.g. while a sweep runs)."""
        previous = self._resource.timeout
        self._resource.timeout = _milliseconds(seconds)
        try:
            yield
        finally:
            self._resource.timeout = previous

    def set_nodelay(self, on: bool) -> bool | None:
        """Switch Nagle's algorithm off (``on=True``) on a raw socket; None if not a raw socket."""
        if self._socket is None:
            return None
        self._socket.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1 if on else 0)
        return on

    # -- I/O ----------------------------------------------------------------------------------

    def write(self, command: str) -> None:
        with self._translated():
            self._resource.write(command)

    def query(self, command: str) -> str:
        """Send ``command`` and return the reply without termination or surrounding blanks."""
        with self._translated():
            return self._resource.query(command).strip()

    def read(self) -> str:
        """Read one more reply (used to skip replies that arrived late)."""
        with self._translated():
            return self._resource.read().strip()

    def query_binary(self, command: str, *, datatype: str, big_endian: bool, count: int,
                     terminated: bool) -> np.ndarray:
        """Send ``command`` and read an IEEE 488.2 definite-length block of ``count`` values.

        datatype   : struct code, ``'d'`` (float64) or ``'f'`` (float32).
        terminated : the block is followed by the read termination character.
        ``count`` only sizes an indefinite ``#0`` block; the caller checks the count it got.
        """
        with self._translated("IEEE 488.2 block"):
            return self._resource.query_binary_values(
                command, datatype=datatype, is_big_endian=big_endian, container=np.array,
                data_points=count, expect_termination=terminated)

    def query_ascii(self, command: str) -> np.ndarray:
        """Send ``command`` and read comma-separated numbers."""
        with self._translated("ASCII numbers"):
            return self._resource.query_ascii_values(command, container=np.array)

    # -- recovery and closing -----------------------------------------------------------------

    def peer_closed(self) -> bool:
        """True if the analyzer has closed a raw-socket connection (False when unknown)."""
        if self._socket is None:
            return False
        try:
            readable, _, _ = select.select([self._socket], [], [], 0)
            return bool(readable) and self._socket.recv(1, socket.MSG_PEEK) == b""
        except OSError:   # reset by the peer, or already closed
            return True

    def discard_input(self) -> None:
        """Throw away whatever the analyzer has sent and nobody read (a late or broken reply).

        Reads until :data:`DRAIN_QUIET_S` of silence, at most :data:`DRAIN_LIMIT_S`. A reply
        the analyzer has not sent yet cannot be removed; a known-answer query must follow.
        """
        with self._translated():
            if self._socket is None:
                self._resource.clear()   # VISA device clear
                return
            self._resource.flush(constants.BufferOperation.discard_read_buffer_no_io)
            deadline = time.monotonic() + DRAIN_LIMIT_S
            while time.monotonic() < deadline:
                readable, _, _ = select.select([self._socket], [], [], DRAIN_QUIET_S)
                if not readable:
                    return
                if not self._socket.recv(65536):
                    raise ConnectionResetError("the analyzer closed the connection")
            raise LinkError(f"the analyzer kept sending for {DRAIN_LIMIT_S} s", dead=True)

    def close(self) -> None:
        """Close the resource (idempotent; errors of an already broken link are ignored)."""
        resource, self._resource = self._resource, None
        self._socket = None
        if resource is not None:
            try:
                resource.close()
            except (VisaIOError, OSError):
                pass

    # -- error translation --------------------------------------------------------------------

    @contextmanager
    def _translated(self, expected: str = "reply") -> Iterator[None]:
        """Turn pyvisa and socket failures into :class:`LinkError` with a readable message."""
        if self._resource is None:
            raise LinkError("the session is closed", where=self.resource, dead=True)
        try:
            yield
        except VisaIOError as error:
            if error.error_code == constants.StatusCode.error_timeout:
                if self.peer_closed():
                    raise LinkError("the analyzer closed the connection", dead=True) from None
                raise LinkError(f"no reply within {self.timeout_s:.3g} s") from None
            raise LinkError(f"VISA error {error.abbreviation}: {error.description}") from None
        except ConnectionRefusedError:
            raise LinkError("connection refused: nothing listens at this address", dead=True) from None
        except OSError as error:
            raise LinkError(f"connection lost: {error.strerror or error}", dead=True) from None
        except (ValueError, InvalidBinaryFormat) as error:   # also UnicodeDecodeError
            raise LinkError(f"malformed {expected}: {error}") from None


def _milliseconds(seconds: float) -> float:
    return float(seconds) * 1000.0


def _raw_socket(resource) -> socket.socket | None:
    """The TCP socket under a pyvisa-py SOCKET session, or None for anything else.

    pyvisa-py has no public handle to it; its sessions table and the session's ``interface``
    attribute are private (library-facts §3.1), so every step is checked.
    """
    sessions = getattr(resource.visalib, "sessions", None)
    if not isinstance(sessions, dict):
        return None
    interface = getattr(sessions.get(resource.session), "interface", None)
    return interface if isinstance(interface, socket.socket) else None
