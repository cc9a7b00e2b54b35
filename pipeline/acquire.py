"""Touchstone file -> :class:`~pipeline.sweep.Sweep`, with ingest errors a person can act on.

scikit-rf (``skrf.io.touchstone.Touchstone``) is the parser. Around it this module adds what
a production line needs and scikit-rf 2.2.0 does not do (see the project's library notes,
sections 1.1 and 1.7):

* checks it skips: NaN/inf values, frequencies that do not rise strictly, a wrong
  ``[Number of Frequencies]``, falling frequencies in a v1 2-port file (which scikit-rf
  silently reads as the start of a noise block), a file over the size limit;
* one-line errors (:class:`~pipeline.errors.InputFileError`) naming the file, the problem
  and, where there is one, the line. scikit-rf raises bare ``ValueError``/``TypeError``
  without context, so when it fails (or a check fails) a light line-by-line scan of the
  text (:func:`_scan`) finds the offending line. The scan runs only on the error path;
  good files cost one scikit-rf parse plus a few numpy checks.
* corrections of two scikit-rf 2.2.0 reading faults:
  - v1 Y-parameter files are normalised (y = Y·R, Touchstone 1.1 spec) but scikit-rf
    multiplies by R instead of dividing (reference case TS-V1-Y-NORMALISED); we undo it.
  - v2 2-port files with ``[Matrix Format] Upper/Lower`` get S12/S21 from uninitialised
    memory; the triangle is rebuilt from the raw values (such a matrix is symmetric, so
    the two-port data order does not matter).
  H and G (hybrid) parameter files are refused: they are not reflection data.

Passivity: an antenna is passive, so |S_pp| <= 1; a calibrated VNA adds noise of a few
hundredths. Up to :data:`PASSIVE_NOISE_LIMIT` (1.05) is accepted silently; above that up
to :data:`PASSIVE_REFUSE_LIMIT` (1.2) the sweep is accepted with an :class:`IngestWarning`
(calibration drift is likely); above 1.2 the file is refused: that is not noise but a
wrong calibration, wrong format/units on the option line, or an active device.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import io
import math
import os
import re
import warnings
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from pipeline.errors import InputFileError
from pipeline.sweep import Provenance, Sweep
from pipeline.units import format_si

DEFAULT_MAX_BYTES = 200 * 1024 ** 2
PASSIVE_NOISE_LIMIT = 1.05     # |S| up to this is measurement noise: accepted silently
PASSIVE_REFUSE_LIMIT = 1.2     # |S| above this is refused (warned in between)

_EXTENSION = re.compile(r"^\.(?:s(\d+)p|ts)$", re.IGNORECASE)
_FREQ_UNITS = {"hz", "khz", "mhz", "ghz"}
_PARAMETERS = {"s", "y", "z", "g", "h"}
_FORMATS = {"ma", "db", "ri"}
_OPTION_HINT = "expected '# <Hz|kHz|MHz|GHz> <S|Y|Z> <MA|DB|RI> R <ohms>', e.g. '# MHz S RI R 50'"


class IngestWarning(UserWarning):
    """A file that was read but looks doubtful (e.g. |S11| slightly above 1)."""


def sha256_file(path: str | Path) -> str:
    """Hex SHA-256 of a file's bytes; raises ``OSError`` if it cannot be read."""
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            digest.update(chunk)
    return digest.hexdigest()


def read_sweep(path: str | Path, *, port: int = 1, z0: float = 50.0,
               max_bytes: int = DEFAULT_MAX_BYTES, dut_id: str | None = None,
               lot: str = "") -> Sweep:
    """Read the reflection S_pp of a Touchstone file (v1 ``.sNp`` or v2 ``.ts``) as a Sweep.

    path      : the file; kept as given in ``provenance.source``.
    port      : 1-based port whose reflection is taken from an N-port file.
    z0        : reference impedance (ohm) of the returned S11; the file's own reference is
                transformed to it with ``Network.renormalize`` (not relabelled).
    max_bytes : files larger than this are refused before reading.
    dut_id    : device id; default the file name without extension.

    S, Z and Y parameter files are accepted. The bytes that are hashed are the bytes that
    are parsed (a file rewritten meanwhile cannot give a hash of other data). Raises
    :class:`InputFileError` (one line: file, problem, line number where there is one).
    """
    where = str(path)
    data, mtime = _read_bytes(Path(path), where, max_bytes)
    text = _decode(data)
    plain = _plain_one_port(text, Path(path).suffix, z0) if port == 1 else None
    if plain is not None:
        freq_hz, s_pp = plain
    else:
        touchstone = _parse(text, where)
        _check_parsed(touchstone, text, where)
        network = _to_network(touchstone, text)
        freq_hz, s_pp = network.f.copy(), _reflection_at_port(network, port, z0, where)
    _check_passive(s_pp, freq_hz, port, text, where)
    provenance = Provenance(
        dut_id=dut_id if dut_id is not None else Path(path).stem,
        lot=lot,
        source=where,
        source_sha256=hashlib.sha256(data).hexdigest(),
        acquired_at=_dt.datetime.fromtimestamp(mtime, tz=_dt.timezone.utc).isoformat(timespec="seconds"),
        port=port,
    )
    return Sweep(freq_hz=freq_hz, s11=s_pp, z0_ohm=float(z0), provenance=provenance)


# --- the fast path for plain one-port S files --------------------------------------------
#
# A production lot is thousands of plain v1 .s1p files; scikit-rf's general parser costs
# about 2-3 times a plain numpy read (library-facts section 1.1). Files of the simplest
# shape (one option line, S parameters, three numbers per row, rising frequencies) are
# read here directly; anything else, and anything wrong, goes through scikit-rf, which
# stays the reference parser (tests/test_acquire.py checks the two agree).

_FREQ_SCALE = {"hz": 1.0, "khz": 1e3, "mhz": 1e6, "ghz": 1e9}


def _plain_option_line(line: str) -> tuple[float, str, float] | None:
    """(frequency scale, format, R) of a v1 option line for S data, else None."""
    unit, fmt, r, tokens = "ghz", "ma", 50.0, line[1:].lower().split()
    i = 0
    while i < len(tokens):
        token = tokens[i]
        if token in _FREQ_SCALE:
            unit = token
        elif token in _FORMATS:
            fmt = token
        elif token == "r" and i + 1 < len(tokens):
            try:
                r = float(tokens[i + 1])
            except ValueError:
                return None
            i += 1
        elif token != "s":
            return None                       # Y/Z/H/G, or anything unusual: scikit-rf
        i += 1
    return (_FREQ_SCALE[unit], fmt, r) if r > 0 else None


def _plain_one_port(text: str, suffix: str, z0: float):
    """(freq_hz, S11 at z0) for a plain v1 one-port S file, or None to use scikit-rf."""
    if suffix.lower() != ".s1p":
        return None
    option, rows = None, []
    for line in text.splitlines():
        line = line.split("!", 1)[0].strip()
        if not line:
            continue
        if line.startswith("#"):
            if option is not None:
                return None                   # a second option line: scikit-rf's rules
            option = _plain_option_line(line)
            if option is None:
                return None
        elif line.startswith("[") or option is None:
            return None                       # v2 keywords, or data before the option line
        else:
            rows.append(line)
    if option is None or not rows:
        return None
    try:
        data = np.array(" ".join(rows).split(), dtype=float)
    except ValueError:
        return None
    if data.size != 3 * len(rows):
        return None
    data = data.reshape(-1, 3)
    scale, fmt, r = option
    freq_hz = data[:, 0] * scale
    if not (np.all(np.isfinite(data)) and freq_hz[0] > 0 and np.all(np.diff(freq_hz) > 0)):
        return None
    a, b = data[:, 1], data[:, 2]
    if fmt == "ri":
        s = a + 1j * b
    else:
        magnitude = a if fmt == "ma" else 10 ** (a / 20)
        s = magnitude * np.exp(1j * np.deg2rad(b))
    if r != z0:                               # renormalise (real references): same Z, new z0
        if np.any(np.abs(1 - s) < 1e-12):
            return None                       # an ideal open: leave it to scikit-rf
        z = r * (1 + s) / (1 - s)
        s = (z - z0) / (z + z0)
    return freq_hz, s


# --- reading the bytes ---------------------------------------------------------------------

def _read_bytes(path: Path, where: str, max_bytes: int) -> tuple[bytes, float]:
    """The file's bytes and mtime; refuses missing, unreadable, misnamed, huge, empty files."""
    try:
        fh = open(path, "rb")
    except FileNotFoundError:
        raise InputFileError("file not found", where=where) from None
    except IsADirectoryError:
        raise InputFileError("is a folder, not a Touchstone file", where=where) from None
    except OSError as error:
        raise InputFileError(f"cannot read: {error.strerror or error}", where=where) from None
    with fh:
        if not _EXTENSION.match(path.suffix):
            raise InputFileError(f"unsupported extension {path.suffix or '(none)'!r} "
                                 "(expected a Touchstone file: .s1p, .s2p, ... or .ts)", where=where)
        status = os.fstat(fh.fileno())
        if status.st_size > max_bytes:
            raise InputFileError(f"file is {_size_text(status.st_size)}, over the "
                                 f"{_size_text(max_bytes)} limit (raise --max-mb if it is genuine)",
                                 where=where)
        data = fh.read(max_bytes + 1)
    if len(data) > max_bytes:      # grew while we looked
        raise InputFileError(f"file is over the {_size_text(max_bytes)} limit", where=where)
    if not data.strip():
        raise InputFileError("file is empty", where=where)
    return data, status.st_mtime


def _size_text(n_bytes: int) -> str:
    return f"{n_bytes / 1024 ** 2:.1f} MB" if n_bytes >= 0.1 * 1024 ** 2 else f"{n_bytes} bytes"


def _decode(data: bytes) -> str:
    """Text of the file: UTF-8 (with or without BOM), else Latin-1 (as scikit-rf does)."""
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError:
        return data.decode("iso-8859-1")


# --- parsing with scikit-rf ----------------------------------------------------------------

def _parse(text: str, where: str):
    """scikit-rf's Touchstone parse of ``text``; its failures become located one-liners."""
    from skrf.io.touchstone import Touchstone

    fid = io.StringIO(text)
    fid.name = where                       # the parser takes the rank from the extension
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")  # we check frequency order ourselves
            return Touchstone(fid)
    except (ValueError, TypeError, IndexError, KeyError, AttributeError) as error:
        raise _located_error(text, where, fallback=f"not a readable Touchstone file ({error})") from None


def _check_parsed(ts, text: str, where: str) -> None:
    """What scikit-rf accepts silently: no data, NaN, unordered or miscounted frequencies."""
    f = ts.f
    checks = (   # (what is wrong, the message if the line scan cannot point at a line)
        (f.size == 0, "no data rows"),
        (not np.all(np.isfinite(f)), "a frequency is not a finite number"),
        (f.size > 0 and f[0] < 0, "negative frequency"),
        (np.any(np.diff(f) <= 0), "frequencies do not rise strictly"),
        (ts.frequency_nb is not None and ts.frequency_nb != f.size,
         f"[Number of Frequencies] says {ts.frequency_nb}, the file has {f.size} data rows"),
        (ts.noise is not None and ts.noise.shape[1:] != (5,),     # network rows read as noise
         "frequencies do not rise strictly"),
        (not np.all(np.real(ts.z0) > 0), "reference impedance must be positive"),
        (not np.all(np.isfinite(ts.s)),
         f"the {ts.parameter.upper()}-parameters convert to an infinite or undefined reflection"),
    )
    for failed, fallback in checks:
        if failed:
            raise _located_error(text, where, fallback=fallback)
    if ts.parameter in ("g", "h"):
        raise InputFileError(f"{ts.parameter.upper()}-parameter (hybrid) files are not supported; "
                             "export S, Z or Y parameters", where=where, line=_scan(text, where).option_line)


def _to_network(ts, text: str):
    """A ``skrf.Network`` of the parsed data, with the scikit-rf 2.2.0 faults corrected."""
    import skrf
    from skrf import network as skn

    s = ts.s
    if ts.rank == 2 and ts.version != "1.0" and _matrix_format(text) in ("upper", "lower"):
        s = _symmetric_two_port(ts, _matrix_format(text))
    elif ts.version == "1.0" and ts.parameter == "y":
        # scikit-rf computed y2s(y_norm * R); the file holds y_norm = Y * R, so Y = y_norm / R.
        r = ts.z0[:, :, None]
        s = skn.y2s(skn.s2y(s, ts.z0) / r / r, ts.z0)
    kwargs = {"s_def": ts.s_def} if ts.s_def else {}
    return skrf.Network(frequency=skrf.Frequency.from_f(ts.f, unit="Hz"), s=s, z0=ts.z0, **kwargs)


def _matrix_format(text: str) -> str:
    """``[Matrix Format]`` of a v2 file: 'full' (the default), 'upper' or 'lower'."""
    m = re.search(r"^\s*\[matrix format\]\s*(\w+)", text, re.IGNORECASE | re.MULTILINE)
    return m.group(1).lower() if m else "full"


def _symmetric_two_port(ts, matrix_format: str) -> np.ndarray:
    """S of a triangular v2 2-port rebuilt from the raw values (scikit-rf 2.2.0 leaves
    S12/S21 uninitialised when it applies the legacy 21_12 order to a triangle)."""
    from skrf import network as skn

    rows, cols = np.triu_indices(2) if matrix_format == "upper" else np.tril_indices(2)
    m = np.zeros((ts.f.size, 2, 2), dtype=complex)
    m[:, rows, cols] = ts.s_flat
    m[:, cols, rows] = ts.s_flat
    if ts.parameter in ("z", "y"):            # v2 Z/Y are in ohms/siemens, not normalised
        m = getattr(skn, f"{ts.parameter}2s")(m, ts.z0)
    return m


def _reflection_at_port(network, port: int, z0: float, where: str) -> np.ndarray:
    """S_pp (1-based port) with every port referred to ``z0`` ohm."""
    nports = network.nports
    if not 1 <= port <= nports:
        raise InputFileError(f"port {port} is out of range: the file has {nports} port"
                             f"{'s' if nports > 1 else ''} (1..{nports})", where=where)
    if not z0 > 0:
        raise InputFileError(f"reference impedance {z0} ohm must be positive", where=where)
    if not np.allclose(network.z0, z0, rtol=1e-12, atol=0):
        network.renormalize(z0)
    return network.s[:, port - 1, port - 1].copy()


def _check_passive(s_pp: np.ndarray, freq_hz: np.ndarray, port: int, text: str, where: str) -> None:
    """Refuse |S_pp| > 1.2, warn above 1.05 (see the module docstring)."""
    mag = np.abs(s_pp)
    worst = int(np.argmax(mag))
    if mag[worst] <= PASSIVE_NOISE_LIMIT:
        return
    name = f"S{port}{port}"
    at = format_si(float(freq_hz[worst]), "Hz", 4)
    if mag[worst] > PASSIVE_REFUSE_LIMIT:
        lines = _scan(text, where).record_lines
        line = lines[worst] if worst < len(lines) else None
        raise InputFileError(
            f"|{name}| = {mag[worst]:.3f} at {at}: a passive antenna cannot reflect more than it "
            f"receives (limit {PASSIVE_REFUSE_LIMIT}); check the calibration and the option line's "
            "format and units", where=where, line=line)
    warnings.warn(IngestWarning(
        f"{where}: |{name}| reaches {mag[worst]:.3f} at {at} (above 1: noise or calibration drift?)"))


# --- locating problems in the text (error path only) ---------------------------------------

@dataclass
class _Scan:
    """What a line-by-line reading of the text found."""

    problem: tuple[int | None, str] | None = None   # (line, message) of the first problem
    record_lines: list[int] = field(default_factory=list)   # line of each network data row
    option_line: int | None = None


class _Found(Exception):
    def __init__(self, line: int | None, message: str):
        super().__init__(message)
        self.line = line
        self.message = message


def _located_error(text: str, where: str, *, fallback: str) -> InputFileError:
    scan = _scan(text, where)
    if scan.problem is None:
        return InputFileError(fallback, where=where)
    line, message = scan.problem
    return InputFileError(message, where=where, line=line)


def _scan(text: str, where: str) -> _Scan:
    """Walk the lines like a strict Touchstone reader and note the first problem.

    Tracks the header (version, ports, matrix format, [Number of Frequencies]), checks
    the option line, every data token (numeric, finite) and the frequency of every data
    row (not negative, strictly rising); ends at a v1 noise block or ``[Noise Data]``.
    """
    result = _Scan()
    state = _ScanState(rank=_rank_from_name(where), is_v2_name=where.lower().endswith(".ts"))
    try:
        for lineno, raw in enumerate(text.splitlines(), start=1):
            if not state.step(lineno, raw.partition("!")[0].strip(), result):
                break
        state.finish(result)
    except _Found as found:
        result.problem = (found.line, found.message)
    return result


def _rank_from_name(where: str) -> int | None:
    m = _EXTENSION.match(Path(where).suffix)
    return int(m.group(1)) if m and m.group(1) else None


@dataclass
class _ScanState:
    rank: int | None
    is_v2_name: bool
    version: str = "1.0"
    matrix_format: str = "full"
    n_freq: int | None = None
    n_freq_line: int | None = None
    in_network: bool = False
    seen_content: bool = False
    position: int = 0                    # index of the next value inside the current row
    last_freq: float | None = None
    last_freq_text: str = ""

    @property
    def values_per_row(self) -> int:
        n = self.rank
        return 1 + (2 * n * n if self.matrix_format == "full" else n * (n + 1))

    def step(self, lineno: int, line: str, result: _Scan) -> bool:
        """Read one line (comment already stripped); False once the network data end."""
        if not line:
            return True
        low = line.lower()
        first = not self.seen_content
        self.seen_content = True
        if first and self.is_v2_name and not low.startswith("[version]"):
            raise _Found(lineno, "a Touchstone 2 (.ts) file must begin with '[Version] 2.0'")
        if low.startswith("["):
            return self._keyword(lineno, low)
        if low.startswith("#"):
            if result.option_line is None:
                result.option_line = lineno
                _check_option_line(lineno, low)
            return True
        if self.version != "1.0" and not self.in_network:
            return True                  # e.g. [Reference] values continued on this line
        return self._data(lineno, line.split(), result)

    def _keyword(self, lineno: int, low: str) -> bool:
        keyword, _, rest = low.partition("]")
        keyword, rest = keyword + "]", rest.strip()
        if keyword == "[version]":
            if rest not in ("1.0", "2.0", "2.1"):
                raise _Found(lineno, f"unsupported Touchstone version {rest!r} (1.0, 2.0 or 2.1)")
            self.version = rest
        elif keyword == "[number of ports]":
            self.rank = _keyword_int(lineno, keyword, rest)
        elif keyword == "[matrix format]":
            self.matrix_format = rest.split()[0] if rest else "full"
        elif keyword == "[number of frequencies]":
            self.n_freq, self.n_freq_line = _keyword_int(lineno, keyword, rest), lineno
        elif keyword == "[network data]":
            if self.rank is None:
                raise _Found(lineno, "[Network Data] before [Number of Ports]")
            self.in_network = True
        elif keyword in ("[noise data]", "[end]"):
            return False
        return True

    def _data(self, lineno: int, tokens: list[str], result: _Scan) -> bool:
        if self.rank is None:
            raise _Found(lineno, "data before the number of ports is known "
                                 "(name the file .sNp, or give [Number of Ports])")
        values = []
        for token in tokens:
            try:
                value = float(token)
            except ValueError:
                raise _Found(lineno, f"non-numeric value {token!r}") from None
            if not math.isfinite(value):
                raise _Found(lineno, f"value {token!r} is not a finite number")
            values.append(value)
        if self.position == 0 and not self._row_start(lineno, tokens, values, result):
            return False
        if self.rank <= 2 and len(values) != self.values_per_row:
            raise _Found(lineno, f"data row has {len(values)} values; a {self.rank}-port row has "
                                 f"{self.values_per_row} (frequency, then the parameters)")
        self.position = (self.position + len(values)) % self.values_per_row
        return True

    def _row_start(self, lineno: int, tokens: list[str], values: list[float], result: _Scan) -> bool:
        """Check the frequency that starts a row; False when a v1 noise block begins."""
        freq = values[0]
        if self.last_freq is not None and freq <= self.last_freq:
            if self.rank == 2 and self.version == "1.0" and freq < self.last_freq and len(values) == 5:
                return False            # v1 noise block: 5 values, frequency starts over
            relation = "repeats" if freq == self.last_freq else "is below"
            raise _Found(lineno, f"frequency {tokens[0]} {relation} the previous row's "
                                 f"{self.last_freq_text} (line {result.record_lines[-1]}); "
                                 "frequencies must rise strictly")
        if freq < 0:
            raise _Found(lineno, f"negative frequency {tokens[0]}")
        self.last_freq, self.last_freq_text = freq, tokens[0]
        result.record_lines.append(lineno)
        return True

    def finish(self, result: _Scan) -> None:
        if self.position != 0:
            raise _Found(result.record_lines[-1], "incomplete data row at the end of the file "
                                                  "(truncated transfer?)")
        if not result.record_lines:
            raise _Found(None, "no data rows (only a header)")
        if self.n_freq is not None and self.n_freq != len(result.record_lines):
            raise _Found(self.n_freq_line, f"[Number of Frequencies] says {self.n_freq}, "
                                           f"the file has {len(result.record_lines)} data rows")


def _keyword_int(lineno: int, keyword: str, rest: str) -> int:
    try:
        return int(rest.split()[0])
    except (ValueError, IndexError):
        raise _Found(lineno, f"{keyword} needs a whole number, not {rest!r}") from None


def _check_option_line(lineno: int, low: str) -> None:
    """The option line in the positional form scikit-rf reads (missing fields default)."""
    tokens = low[1:].split()
    checks = ((_FREQ_UNITS, "frequency unit"), (_PARAMETERS, "parameter"), (_FORMATS, "format"))
    for token, (allowed, what) in zip(tokens, checks):
        if token not in allowed:
            raise _Found(lineno, f"option line: unknown {what} {token!r}; {_OPTION_HINT}")
    if len(tokens) > 3:
        if tokens[3] != "r" or len(tokens) < 5:
            raise _Found(lineno, f"option line: {' '.join(tokens[3:])!r} is not 'R <ohms>'; {_OPTION_HINT}")
        for token in tokens[4:]:
            try:
                ohms = float(token)
            except ValueError:
                raise _Found(lineno, f"option line: reference {token!r} is not a number") from None
            if not ohms > 0:
                raise _Found(lineno, f"option line: reference {token!r} ohm must be positive")
