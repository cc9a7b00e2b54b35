"""The HDF5 results store: one record per unit under test, lot summaries, failed files.

One file holds three append-only tables (the full layout, readable with plain h5py, is in
DEVELOPERS.md, "The results store"):

* ``/units``    one row per processed unit (:class:`UnitRecord`): identity, provenance,
  metrics, its own matching network, and its traces (frequencies, raw, de-embedded and
  matched S11);
* ``/failures`` one row per file that could not be processed, with the reason;
* ``/lots``     one row per stored lot summary (shared network, yield, tolerance run);
  a later row for the same lot supersedes the earlier ones.

Each table is an ``index`` dataset (compound rows of fixed size: the numbers and short
strings) plus flat "payload" datasets that the rows point into with an offset and
segment lengths (traces of any length; UTF-8 text and JSON documents). Nothing is ever
rewritten in place, so a record, once committed, stays as it is.

Crash safety (a writer killed at any moment, ``kill -9`` included):

* one writer process at a time, enforced with an advisory lock on ``<store>.lock``;
* datasets are created once, with their fixed schema, as resizable chunked datasets, and
  the file is written in HDF5 SWMR mode, which keeps the file structure valid for readers
  and after a crash;
* a record is committed in two steps: payloads are written and flushed first, the index
  row last, then the file is flushed; only then does :meth:`ResultsStore.append` return
  (the acknowledgement). Every index row carries a CRC-32 of its own bytes, so a torn or
  not-yet-written row (fill value) is recognised; on open, the committed length of a table
  is the run of valid rows, and whatever lies beyond it is truncated by the next writer;
* a crashed SWMR writer leaves a "file is open for writing" mark in the superblock that
  makes HDF5 refuse ordinary opens. The next writer clears it through the HDF5 library
  h5py is linked to (the same file-access properties the ``h5clear -s --increment=0``
  tool sets), so no external tool is needed; readers open with ``swmr=True``, which
  works on such a file anyway.

Idempotence: a unit whose (source sha256, settings hash) is already stored is not stored
again; a new result for a known ``dut_id`` is a new record whose ``replaces`` column is
the index of the record it supersedes. Queries return the latest record per DUT unless
asked otherwise.

Durability: SIGKILL leaves the operating system's page cache intact, which is what the
above protects against. The file is fsync'ed when a writer closes it; a power cut in the
middle of a lot can lose the records written since the last close.
"""

from __future__ import annotations

import ctypes
import dataclasses
import datetime as _dt
import errno
import hashlib
import json
import os
import time
import zlib
from dataclasses import dataclass, field
from pathlib import Path

import h5py
import numpy as np
import pandas as pd

import pipeline
from pipeline.errors import StoreError

FORMAT_NAME = "matchbay-results"
FORMAT_VERSION = 1

#: HDF5 format bounds: SWMR needs the 1.10 format; staying at it keeps the file readable by
#: any HDF5 >= 1.10 (h5py >= 2.6), not only by the HDF5 2.0 this was built with.
_LIBVER = ("v110", "v110")

#: At most this many rows are written between two flushes. A crash can therefore leave at
#: most this many torn rows at the end of a table, so recovery checks the CRC of the last
#: ``_MAX_ROWS_PER_COMMIT`` rows only, not the whole file.
_MAX_ROWS_PER_COMMIT = 512

#: Records further apart than this are read separately by :meth:`ResultsStore.get_units`.
_GROUP_GAP = 64

#: How long an open waits for another process (a reader, or a writer finishing its
#: recovery) to let go of the HDF5 file lock, seconds.
OPEN_TIMEOUT_S = 10.0

_FLOAT_NAN = float("nan")


def _empty_array(dtype) -> np.ndarray:
    return np.zeros(0, dtype=dtype)


@dataclass
class UnitRecord:
    """Everything stored about one device under test.

    Identity and provenance: ``dut_id`` (from the file name unless given), ``lot``,
    ``serial`` (where known), ``source`` path and its ``source_sha256``, the
    ``settings_hash`` of what decided the result (see :func:`settings_hash`), acquisition
    and processing times (ISO 8601, UTC), the ``tool_version``, the ``config`` (JSON-ready
    dict), the ``fixture`` chain applied (list of dicts), the part ``series`` and the
    ``parts`` library with its models (dict).

    Traces (numpy arrays of one length N): ``freq_hz`` (Hz), ``s11_raw`` as measured,
    ``s11_dut`` after de-embedding, ``s11_matched`` the predicted S11 with the unit's own
    network (complex, at ``z0_ohm``).

    The unit's own network: ``elements`` (list of dicts in the shape of interfaces.md,
    source port first) and its ``topology`` name.

    Metrics: every ``float`` field below is one column of :func:`units_frame`; a new float
    field here becomes a new column of new stores (old stores read it as NaN). Return loss
    is in dB, positive; "worst" is the smallest over the band, "center" at the band centre;
    ``bw_*_hz`` is the width around the centre meeting ``spec_rl_db``. ``headroom`` is the
    dict of :mod:`pipeline.headroom`; its :data:`HEADROOM_COLUMNS` become columns too.
    ``extras`` holds any further JSON-ready data.

    ``index`` and ``replaces`` are set by the store (-1 until stored / when nothing is
    replaced).
    """

    dut_id: str
    lot: str = ""
    serial: str = ""
    source: str = ""
    source_sha256: str = ""
    settings_hash: str = ""
    acquired_at: str = ""
    processed_at: str = ""
    tool_version: str = pipeline.__version__
    config: dict = field(default_factory=dict)
    fixture: list = field(default_factory=list)
    parts: dict = field(default_factory=dict)
    series: str = ""
    freq_hz: np.ndarray = field(default_factory=lambda: _empty_array(float))
    s11_raw: np.ndarray = field(default_factory=lambda: _empty_array(complex))
    s11_dut: np.ndarray = field(default_factory=lambda: _empty_array(complex))
    s11_matched: np.ndarray = field(default_factory=lambda: _empty_array(complex))
    elements: list = field(default_factory=list)
    topology: str = ""
    band_lo_hz: float = _FLOAT_NAN
    band_hi_hz: float = _FLOAT_NAN
    z0_ohm: float = _FLOAT_NAN
    spec_rl_db: float = _FLOAT_NAN
    rl_before_worst_db: float = _FLOAT_NAN
    rl_before_center_db: float = _FLOAT_NAN
    rl_after_worst_db: float = _FLOAT_NAN
    rl_after_center_db: float = _FLOAT_NAN
    bw_before_hz: float = _FLOAT_NAN
    bw_after_hz: float = _FLOAT_NAN
    delivered_fraction_min: float = _FLOAT_NAN
    headroom: dict = field(default_factory=dict)
    extras: dict = field(default_factory=dict)
    index: int = -1
    replaces: int = -1

    @property
    def pass_before(self) -> bool:
        """The unmatched unit meets the spec over the whole band."""
        return bool(self.rl_before_worst_db >= self.spec_rl_db)

    @property
    def pass_after(self) -> bool:
        """The unit meets the spec over the band with its own network (predicted)."""
        return bool(self.rl_after_worst_db >= self.spec_rl_db)


#: Float columns of the units table: the ``float`` fields of :class:`UnitRecord`.
METRIC_COLUMNS: tuple[str, ...] = tuple(
    f.name for f in dataclasses.fields(UnitRecord) if f.type == "float")

#: Keys of ``UnitRecord.headroom`` that also get a float column (same name) of their own.
HEADROOM_COLUMNS: tuple[str, ...] = ("q_estimate", "rl_bound_db", "headroom_db")

#: Short text fields stored in the index row itself: name -> maximum UTF-8 bytes.
_UNIT_STRINGS = {
    "dut_id": 128, "lot": 64, "serial": 64, "source_sha256": 64, "settings_hash": 64,
    "tool_version": 32, "series": 32, "topology": 64,
}
#: Times, stored as float seconds since 1970-01-01 UTC (NaN when unknown); ISO 8601 in records.
_UNIT_TIMES = ("acquired_at", "processed_at")
#: Variable-length text: payload dataset -> the fields stored there, in order.
_UNIT_TEXTS = {
    "strings": ("source", "elements"),                                  # read by units_frame
    "documents": ("config", "fixture", "parts", "headroom", "extras"),  # read by get_unit
}
_JSON_FIELDS = ("elements", "config", "fixture", "parts", "headroom", "extras")
_TRACE_FIELDS = ("freq_hz", "s11_raw", "s11_dut", "s11_matched")
_TRACE_DTYPE = np.dtype([("freq_hz", "<f8"), ("s11_raw", "<c16"), ("s11_dut", "<c16"),
                         ("s11_matched", "<c16")])


# --------------------------------------------------------------------------- helpers

def _json_default(value):
    """numpy scalars and arrays inside configs and summaries become plain JSON."""
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, (set, frozenset)):
        return sorted(value)
    raise TypeError(f"{type(value).__name__} is not JSON-serialisable")


def _to_json(value) -> str:
    return json.dumps(value, default=_json_default, separators=(",", ":"), ensure_ascii=False)


def settings_hash(settings: dict) -> str:
    """Stable SHA-256 (hex) of ``settings``: JSON with sorted keys, no whitespace."""
    text = json.dumps(settings, default=_json_default, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _now_iso() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="milliseconds")


def _epoch_s(text: str, what: str, where: str) -> float:
    """ISO 8601 text (a naive time is taken as UTC) to seconds since the epoch; '' -> NaN."""
    if not text:
        return _FLOAT_NAN
    try:
        moment = _dt.datetime.fromisoformat(str(text).replace("Z", "+00:00"))
    except ValueError:
        raise StoreError(f"{what} {text!r} is not an ISO 8601 time", where=where) from None
    if moment.tzinfo is None:
        moment = moment.replace(tzinfo=_dt.timezone.utc)
    return moment.timestamp()


def _iso_utc(seconds: float) -> str:
    """Seconds since the epoch to ISO 8601 UTC; NaN -> ''."""
    if not np.isfinite(seconds):
        return ""
    return _dt.datetime.fromtimestamp(float(seconds), _dt.timezone.utc).isoformat()


def _decode_fixed(column: np.ndarray) -> list[str]:
    """Fixed-size UTF-8 byte strings (numpy ``S``) to ``str`` (3x faster than np.char.decode)."""
    return [value.decode("utf-8") for value in column.tolist()]


# --------------------------------------------------------------------------- tables

@dataclass(frozen=True)
class _Payload:
    """A flat dataset that rows point into: ``<name>_offset`` plus one length per segment."""

    name: str
    dtype: np.dtype
    chunk: int
    segments: tuple[str, ...]          # row fields holding each segment's length


@dataclass(frozen=True)
class _TableSpec:
    """Schema of one append-only table (a group with an index and payload datasets)."""

    group: str
    strings: dict                      # field -> max UTF-8 bytes
    numbers: tuple[tuple[str, str], ...]
    payloads: tuple[_Payload, ...]
    rows_per_chunk: int

    def row_dtype(self) -> np.dtype:
        fields = [(name, f"S{size}") for name, size in self.strings.items()]
        fields += list(self.numbers)
        for payload in self.payloads:
            fields.append((f"{payload.name}_offset", "<i8"))
            fields += [(segment, "<i8") for segment in payload.segments]
        fields.append(("crc32", "<u4"))           # CRC-32 of all the bytes before it
        return np.dtype(fields)


def _text_payload(name: str, texts: tuple[str, ...], chunk: int) -> _Payload:
    return _Payload(name, np.dtype("u1"), chunk, tuple(f"{t}_nbytes" for t in texts))


_UNITS = _TableSpec(
    group="units",
    strings=_UNIT_STRINGS,
    numbers=(("replaces", "<i8"),) + tuple((name, "<f8") for name in _UNIT_TIMES)
    + tuple((m, "<f8") for m in METRIC_COLUMNS + HEADROOM_COLUMNS),
    payloads=(_Payload("traces", _TRACE_DTYPE, 4096, ("n_points",)),
              _text_payload("strings", _UNIT_TEXTS["strings"], 16384),
              _text_payload("documents", _UNIT_TEXTS["documents"], 65536)),
    rows_per_chunk=128,
)
_FAILURES = _TableSpec(
    group="failures",
    strings={"source_sha256": 64, "settings_hash": 64, "lot": 64},
    numbers=(("failed_at", "<f8"),),
    payloads=(_text_payload("text", ("source", "reason"), 16384),),
    rows_per_chunk=128,
)
_LOTS = _TableSpec(
    group="lots",
    strings={"lot": 64},
    numbers=(("stored_at", "<f8"),),
    payloads=(_text_payload("text", ("summary",), 65536),),
    rows_per_chunk=32,
)
_TABLES = (_UNITS, _FAILURES, _LOTS)


def _row_crcs(rows: np.ndarray) -> np.ndarray:
    """CRC-32 of each row's bytes up to its ``crc32`` field."""
    stop = rows.dtype.fields["crc32"][1]
    raw = np.ascontiguousarray(rows).view(np.uint8).reshape(len(rows), rows.dtype.itemsize)
    return np.fromiter((zlib.crc32(r[:stop]) for r in raw), dtype="<u4", count=len(rows))


class _Table:
    """One table of an open file: committed length, reading, and committing rows."""

    def __init__(self, spec: _TableSpec, group: h5py.Group):
        self.spec = spec
        self.index = group["index"]
        self.payloads = {p.name: group[p.name] for p in spec.payloads}
        self.dtype = self.index.dtype
        self.memory_types = {ds.name: h5py.h5t.py_create(ds.dtype)
                             for ds in (self.index, *self.payloads.values())}
        self.n = 0                                   # committed rows
        self.ends = {p.name: 0 for p in spec.payloads}  # committed payload lengths

    @staticmethod
    def create(spec: _TableSpec, parent: h5py.Group) -> None:
        group = parent.create_group(spec.group)
        group.create_dataset("index", shape=(0,), maxshape=(None,), dtype=spec.row_dtype(),
                             chunks=(spec.rows_per_chunk,))
        for p in spec.payloads:
            group.create_dataset(p.name, shape=(0,), maxshape=(None,), dtype=p.dtype,
                                 chunks=(p.chunk,))

    def refresh(self) -> None:
        """SWMR reader: see what the writer has flushed (index first, payloads after)."""
        self.index.refresh()
        for ds in self.payloads.values():
            ds.refresh()

    def _payload_end(self, row) -> dict:
        return {p.name: int(row[f"{p.name}_offset"]) + sum(int(row[s]) for s in p.segments)
                for p in self.spec.payloads}

    def find_committed(self) -> None:
        """Set ``n`` and ``ends``: the file's rows up to the first torn or unflushed one.

        Only the last ``_MAX_ROWS_PER_COMMIT`` rows can be torn (see :meth:`append`), so
        only those are read and checked.
        """
        total = self.index.shape[0]
        start = max(0, total - _MAX_ROWS_PER_COMMIT)
        tail = self.index[start:total]
        bad = np.flatnonzero(_row_crcs(tail) != tail["crc32"])
        n = start + int(bad[0]) if bad.size else total
        # A row counts only once its payloads are visible too (they are written first).
        lengths = {name: ds.shape[0] for name, ds in self.payloads.items()}
        while n > start and any(end > lengths[name]
                                for name, end in self._payload_end(tail[n - 1 - start]).items()):
            n -= 1
        self.n = n
        if n == 0:
            self.ends = {p.name: 0 for p in self.spec.payloads}
        else:
            self.ends = self._payload_end(tail[n - 1 - start] if n > start else self.index[n - 1])

    def committed_rows(self) -> np.ndarray:
        return self.index[:self.n]

    def truncate_to_committed(self) -> None:
        """Writer, after a crash: cut off torn rows and orphaned payload tails."""
        if self.index.shape[0] != self.n:
            self.index.resize((self.n,))
        for name, ds in self.payloads.items():
            if ds.shape[0] != self.ends[name]:
                ds.resize((self.ends[name],))

    def payload_slice(self, name: str, offset: int, length: int) -> np.ndarray:
        return self.payloads[name][offset:offset + length]

    def append(self, rows: np.ndarray, data: dict, flush) -> range:
        """Commit ``rows`` (their offsets and CRCs are filled in here) with payload ``data``.

        ``data[name]`` is the payload of all rows, end to end, in row order. Rows go out in
        groups of at most ``_MAX_ROWS_PER_COMMIT``: payloads, ``flush()`` (the whole file),
        the index rows, ``flush()`` again. Returns the committed row indices.
        """
        first = self.n
        seg_lengths = {p.name: sum(rows[s] for s in p.segments) for p in self.spec.payloads}
        seg_starts = {name: np.concatenate(([0], np.cumsum(lengths)))
                      for name, lengths in seg_lengths.items()}
        for lo in range(0, len(rows), _MAX_ROWS_PER_COMMIT):
            hi = min(lo + _MAX_ROWS_PER_COMMIT, len(rows))
            group = rows[lo:hi]
            for name, ds in self.payloads.items():
                a, b = int(seg_starts[name][lo]), int(seg_starts[name][hi])
                group[f"{name}_offset"] = self.ends[name] + seg_starts[name][lo:hi] - a
                if b > a:
                    _write_at_end(ds, self.memory_types[ds.name], self.ends[name], data[name][a:b])
            flush()                          # payloads reach the OS before their index rows
            group["crc32"] = _row_crcs(group)
            _write_at_end(self.index, self.memory_types[self.index.name], self.n, group)
            flush()
            self.n += len(group)
            for name in self.ends:
                self.ends[name] += int(seg_starts[name][hi] - seg_starts[name][lo])
        return range(first, self.n)


def _write_at_end(ds: h5py.Dataset, memory_type, start: int, values: np.ndarray) -> None:
    """Make ``ds`` exactly ``start + len(values)`` long and write ``values`` at ``start``.

    Low-level h5py calls with the HDF5 memory type made once per dataset: a third of the
    cost of ``ds.resize`` plus ``ds[start:] = values`` (which rebuilds the compound type
    on every call), and that matters on the one-record-per-commit path.
    """
    dsid = ds.id
    dsid.set_extent((start + len(values),))
    file_space = dsid.get_space()
    file_space.select_hyperslab((start,), (len(values),))
    dsid.write(h5py.h5s.create_simple((len(values),)), file_space, np.ascontiguousarray(values),
               mtype=memory_type)


def _fixed(value: str, size: int, what: str, where: str) -> bytes:
    data = str(value).encode("utf-8")
    if len(data) > size:
        raise StoreError(f"{what} is {len(data)} bytes long; the store keeps at most {size}",
                         where=where)
    return data


def _texts_to_payload(spec: _TableSpec, rows: np.ndarray, texts: list[dict]) -> dict:
    """Fill the ``*_nbytes`` fields of ``rows`` and return each text payload as uint8.

    ``texts[i]`` maps each text field of row ``i`` (``source``, ``reason``...) to its str.
    """
    data = {}
    for p in spec.payloads:
        if p.dtype != np.uint8:
            continue
        names = [segment[:-len("_nbytes")] for segment in p.segments]
        encoded = [[row_texts[name].encode("utf-8") for name in names] for row_texts in texts]
        for j, segment in enumerate(p.segments):
            rows[segment] = [len(parts[j]) for parts in encoded]
        data[p.name] = np.frombuffer(b"".join(b"".join(parts) for parts in encoded), dtype=np.uint8)
    return data


# --------------------------------------------------------------------------- opening

def _is_lock_error(error: OSError) -> bool:
    text = str(error)
    return getattr(error, "errno", None) in (errno.EAGAIN, errno.EWOULDBLOCK) or "lock file" in text


def _retry_while_locked(open_file, timeout_s: float):
    """Call ``open_file()``, retrying while another process holds the HDF5 file lock."""
    deadline = time.monotonic() + timeout_s
    pause = 0.005
    while True:
        try:
            return open_file()
        except OSError as error:
            if not _is_lock_error(error) or time.monotonic() > deadline:
                raise
        time.sleep(pause)
        pause = min(pause * 2, 0.2)


def _fapl() -> h5py.h5p.PropFAID:
    fapl = h5py.h5p.create(h5py.h5p.FILE_ACCESS)
    fapl.set_libver_bounds(h5py.h5f.LIBVER_V110, h5py.h5f.LIBVER_V110)
    return fapl


def _hdf5_library() -> ctypes.CDLL:
    """The HDF5 C library h5py itself uses (symbols resolve through its extension module)."""
    return ctypes.CDLL(h5py.h5p.__file__)


def _clear_writer_mark(path: Path) -> None:
    """Remove the superblock mark a crashed SWMR writer leaves, as ``h5clear -s`` does.

    HDF5 refuses to open such a file for writing ("file is already open for write/SWMR
    write"). The library's own file-access properties ``clear_status_flags``,
    ``skip_eof_check`` and ``null_fsm_addr`` (the ones the h5clear tool sets) let one open
    succeed; ``H5Fincrement_filesize(fid, 0)`` then moves the stored end-of-allocation to
    the real end of file, which a SWMR writer leaves behind, so new space is never
    allocated over existing data. Only called while holding the writer lock.
    """
    try:
        lib = _hdf5_library()
        set_property = lib.H5Pset
        increment = lib.H5Fincrement_filesize
    except (OSError, AttributeError) as error:
        raise StoreError(f"the store was left open by a writer that stopped, and the HDF5 "
                         f"library cannot be reached to clear that mark ({error}); run "
                         f"`h5clear -s --increment=0` on it", where=str(path)) from None
    set_property.argtypes = [ctypes.c_int64, ctypes.c_char_p, ctypes.c_void_p]
    set_property.restype = ctypes.c_int
    increment.argtypes = [ctypes.c_int64, ctypes.c_uint64]
    increment.restype = ctypes.c_int
    fapl = _fapl()
    enable = ctypes.c_bool(True)
    for name in (b"clear_status_flags", b"skip_eof_check", b"null_fsm_addr"):
        if set_property(fapl.id, name, ctypes.byref(enable)) < 0:
            raise StoreError(f"cannot set HDF5 property {name.decode()} to recover the store",
                             where=str(path))
    fid = h5py.h5f.open(os.fsencode(path), h5py.h5f.ACC_RDWR, fapl=fapl)
    try:
        if increment(fid.id, 0) < 0:
            raise StoreError("cannot reset the end of allocation to recover the store",
                             where=str(path))
    finally:
        fid.close()


class _WriterLock:
    """An exclusive advisory lock on ``<store>.lock``, released by the OS if we die."""

    def __init__(self, store_path: Path):
        self.path = Path(str(store_path) + ".lock")
        self._fh = None

    def acquire(self) -> None:
        store = str(self.path)[:-len(".lock")]
        try:
            fh = open(self.path, "a+b")
        except OSError as error:
            raise StoreError(f"cannot create the store's lock file: {error.strerror or error}",
                             where=store) from None
        try:
            _lock_exclusive(fh)
        except OSError:
            fh.close()
            raise StoreError("another process is writing to this store (one writer at a time)",
                             where=store) from None
        self._fh = fh

    def release(self) -> None:
        if self._fh is not None:
            self._fh.close()                  # closing the descriptor drops the lock
            self._fh = None


try:
    import fcntl

    def _lock_exclusive(fh) -> None:
        fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
except ImportError:  # pragma: no cover - Windows
    import msvcrt

    def _lock_exclusive(fh) -> None:
        msvcrt.locking(fh.fileno(), msvcrt.LK_NBLCK, 1)


def _create_layout(path: Path) -> None:
    """Write an empty store next to ``path`` and move it into place in one rename."""
    temporary = Path(str(path) + ".creating")
    with h5py.File(temporary, "w", libver=_LIBVER) as f:
        f.attrs["format"] = FORMAT_NAME
        f.attrs["format_version"] = FORMAT_VERSION
        f.attrs["created_by"] = f"matchbay {pipeline.__version__}"
        f.attrs["created_at"] = _now_iso()
        for spec in _TABLES:
            _Table.create(spec, f)
    os.replace(temporary, path)


def _check_layout(f: h5py.File, path: Path) -> None:
    if f.attrs.get("format") != FORMAT_NAME or any(t.group not in f for t in _TABLES):
        raise StoreError("not a matchbay results store (an HDF5 file of another layout)",
                         where=str(path))
    version = int(f.attrs.get("format_version", 0))
    if version > FORMAT_VERSION:
        raise StoreError(f"store format version {version} is newer than this matchbay "
                         f"reads ({FORMAT_VERSION}); upgrade matchbay", where=str(path))


def _open_error(path: Path, error: OSError) -> StoreError:
    if _is_lock_error(error):
        return StoreError("the store is held open by another process (an open without SWMR); "
                          "try again when it is closed", where=str(path))
    if not h5py.is_hdf5(path):
        return StoreError("not an HDF5 file", where=str(path))
    return StoreError(f"cannot open the store: {error}", where=str(path))


# --------------------------------------------------------------------------- the store

class ResultsStore:
    """An HDF5 results store, opened for writing (``mode="a"``) or reading (``mode="r"``).

    Use it as a context manager. ``mode="a"`` creates the file and its layout if needed;
    only one writer may have a store open at a time (others get a :class:`StoreError`).
    ``mode="r"`` opens it for SWMR reading, safe while a writer appends; every query sees
    what the writer had committed when it was called. Keep readers short-lived: a reader
    holding the file while no writer is attached makes a starting writer wait (up to
    ``timeout_s``).
    """

    def __init__(self, path: str | Path, mode: str = "a", *, timeout_s: float = OPEN_TIMEOUT_S):
        if mode not in ("a", "r"):
            raise ValueError("mode must be 'a' (write) or 'r' (read)")
        self.path = Path(path)
        self.mode = mode
        self._lock = None
        self._file = None
        try:
            if mode == "r":
                self._open_reader(timeout_s)
            else:
                self._open_writer(timeout_s)
        except BaseException:
            self.close()
            raise

    # ---- opening and closing
    def _open_reader(self, timeout_s: float) -> None:
        if not self.path.is_file():
            raise StoreError("no such results store", where=str(self.path))
        try:
            self._file = _retry_while_locked(lambda: h5py.File(self.path, "r", swmr=True), timeout_s)
        except OSError as error:
            raise _open_error(self.path, error) from None
        self._attach()

    def _open_writer(self, timeout_s: float) -> None:
        if self.path.exists() and not self.path.is_file():
            raise StoreError("is not a file", where=str(self.path))
        self._lock = _WriterLock(self.path)
        self._lock.acquire()
        if not self.path.exists():
            try:
                _create_layout(self.path)
            except OSError as error:
                raise StoreError(f"cannot create the store: {error.strerror or error}",
                                 where=str(self.path)) from None
        try:
            self._file = _retry_while_locked(self._open_swmr_writer, timeout_s)
        except OSError as error:
            raise _open_error(self.path, error) from None
        self._attach()
        for table in self._tables.values():
            table.truncate_to_committed()
        self._file.flush()

    def _open_swmr_writer(self) -> h5py.File:
        """Open read-write in SWMR mode; after a crashed writer, clear its mark first."""
        name = os.fsencode(self.path)
        flags = h5py.h5f.ACC_RDWR | h5py.h5f.ACC_SWMR_WRITE
        try:
            fid = h5py.h5f.open(name, flags, fapl=_fapl())
        except OSError as error:
            if "already open for write" not in str(error):
                raise
            with h5py.File(self.path, "r", swmr=True) as peek:   # only ever repair our own files
                _check_layout(peek, self.path)
            _clear_writer_mark(self.path)
            fid = h5py.h5f.open(name, flags, fapl=_fapl())
        return h5py.File(fid)

    def _attach(self) -> None:
        """Check the layout, find the committed rows, and (writer) load idempotence keys."""
        _check_layout(self._file, self.path)
        self._tables = {spec.group: _Table(spec, self._file[spec.group]) for spec in _TABLES}
        for table in self._tables.values():
            table.find_committed()
        if self.mode == "a":
            self._load_writer_state()

    def _load_writer_state(self) -> None:
        """Keys for idempotence and the latest record per DUT, from the committed rows."""
        units = self._tables["units"].committed_rows()
        shas = _decode_fixed(units["source_sha256"])
        digests = _decode_fixed(units["settings_hash"])
        self._unit_keys = {(sha, digest): i for i, (sha, digest) in enumerate(zip(shas, digests)) if sha}
        self._latest = {dut: i for i, dut in enumerate(_decode_fixed(units["dut_id"]))}
        table = self._tables["failures"]
        failures = table.committed_rows()
        sources = _text_columns(table, failures, "text")["source"]
        self._failure_keys = {
            _failure_key(sha, source, digest): i for i, (sha, source, digest) in enumerate(zip(
                _decode_fixed(failures["source_sha256"]), sources,
                _decode_fixed(failures["settings_hash"])))}

    def close(self) -> None:
        """Flush and fsync (writer), close the file, release the writer lock."""
        if self._file is not None:
            try:
                if self.mode == "a" and self._file.id.valid:
                    self._file.flush()
                    os.fsync(self._file.id.get_vfd_handle())
            finally:
                self._file.close()
                self._file = None
        if self._lock is not None:
            self._lock.release()
            self._lock = None

    def __enter__(self) -> "ResultsStore":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def __len__(self) -> int:
        """Number of committed unit records (superseded ones included)."""
        return self._catch_up("units").n

    # ---- internals
    def _require_writer(self) -> None:
        if self._file is None:
            raise StoreError("store is closed", where=str(self.path))
        if self.mode != "a":
            raise StoreError("store is open read-only", where=str(self.path))

    def _catch_up(self, group: str) -> _Table:
        """A table; a reader first picks up what the writer has committed since."""
        if self._file is None:
            raise StoreError("store is closed", where=str(self.path))
        table = self._tables[group]
        if self.mode == "r":
            table.refresh()
            table.find_committed()
        return table

    def _rows(self, group: str) -> np.ndarray:
        """Committed rows of a table (a reader catches up first)."""
        return self._catch_up(group).committed_rows()

    def _commit(self, table: _Table, rows: np.ndarray, data: dict) -> range:
        """Append rows to ``table``; an HDF5 or OS failure (disk full...) is a StoreError,
        and the in-memory keys are rebuilt from what did get committed."""
        try:
            return table.append(rows, data, self._file.flush)
        except (OSError, RuntimeError, ValueError) as error:
            table.find_committed()
            self._load_writer_state()
            raise StoreError(f"cannot write to the store: {error}", where=str(self.path)) from None

    # ---- units: writing
    def contains(self, sha256: str, settings_hash: str) -> bool:
        """True when a unit with this source hash and settings hash is stored."""
        if self.mode == "a":
            return (sha256, settings_hash) in self._unit_keys
        rows = self._rows("units")
        return bool(np.any((rows["source_sha256"] == sha256.encode())
                           & (rows["settings_hash"] == settings_hash.encode())))

    def latest_index_for(self, dut_id: str) -> int | None:
        """Index of the newest record of ``dut_id``, or None."""
        if self.mode == "a":
            return self._latest.get(dut_id)
        hits = np.flatnonzero(self._rows("units")["dut_id"] == dut_id.encode("utf-8"))
        return int(hits[-1]) if hits.size else None

    def append(self, record: UnitRecord) -> int:
        """Store one unit; returns its record index once it is committed (flushed).

        A unit already stored with the same source sha256 and settings hash is not stored
        again: the index of the existing record is returned.
        """
        return self.append_many([record])[0]

    def append_many(self, records) -> list[int]:
        """Store several units, flushing once per group of rows; returns their indices.

        The fast path for lots. Duplicates (already stored, or repeated in ``records``)
        return the index of the existing record. A record for a ``dut_id`` already stored
        gets ``replaces`` = that DUT's latest record.
        """
        self._require_writer()
        table = self._tables["units"]
        keys, latest = {}, {}             # this call's additions, merged once committed
        result, new = [], []
        for record in records:
            key = _unit_key(record)
            known = keys.get(key, self._unit_keys.get(key)) if key[0] else None
            if known is not None:
                result.append(known)
                continue
            index = table.n + len(new)
            new.append((record, key[1], latest.get(record.dut_id, self._latest.get(record.dut_id, -1))))
            if key[0]:
                keys[key] = index
            latest[record.dut_id] = index
            result.append(index)
        if new:
            rows, data = self._unit_rows(new)
            self._commit(table, rows, data)
            self._unit_keys.update(keys)
            self._latest.update(latest)
        return result

    def _unit_rows(self, new: list) -> tuple[np.ndarray, dict]:
        """Index rows (offsets and CRCs still empty) and payloads for new unit records."""
        table = self._tables["units"]
        missing = [m for m in METRIC_COLUMNS + HEADROOM_COLUMNS if m not in table.dtype.names]
        if missing:
            raise StoreError(f"store was made by an older matchbay without the columns "
                             f"{', '.join(missing)}; use a new store file", where=str(self.path))
        records = [record for record, _, _ in new]
        wheres = [r.source or r.dut_id or "unit record" for r in records]
        for record, where in zip(records, wheres):
            if not record.dut_id:
                raise StoreError("unit record has no dut_id", where=where)
        rows = np.zeros(len(new), dtype=table.dtype)
        for name, size in _UNIT_STRINGS.items():
            values = [digest for _, digest, _ in new] if name == "settings_hash" else \
                [getattr(r, name) for r in records]
            rows[name] = [_fixed(v, size, name, w) for v, w in zip(values, wheres)]
        rows["acquired_at"] = [_epoch_s(r.acquired_at, "acquired_at", w) for r, w in zip(records, wheres)]
        now = time.time()
        rows["processed_at"] = [_epoch_s(r.processed_at, "processed_at", w) if r.processed_at else now
                                for r, w in zip(records, wheres)]
        rows["replaces"] = [replaces for _, _, replaces in new]
        for metric in METRIC_COLUMNS:
            rows[metric] = [getattr(r, metric) for r in records]
        for key in HEADROOM_COLUMNS:
            rows[key] = [_float_or_nan((r.headroom or {}).get(key), f"headroom {key}", w)
                         for r, w in zip(records, wheres)]
        traces, rows["n_points"] = _trace_payload(records, wheres)
        data = _texts_to_payload(table.spec, rows, [_record_texts(r, w) for r, w in zip(records, wheres)])
        data["traces"] = traces
        return rows, data

    # ---- units: reading
    def get_unit(self, index: int) -> UnitRecord:
        """The full record ``index``: traces, JSON documents, metrics, provenance."""
        return self.get_units([index])[0]

    def get_units(self, indices) -> list[UnitRecord]:
        """Several full records, in the order asked; the fast way to load a lot's traces.

        Records are read in groups of neighbours (sorted by index, at most
        ``_GROUP_GAP`` records apart), one read per payload dataset for each group,
        instead of four small reads per record.
        """
        if self._file is None:
            raise StoreError("store is closed", where=str(self.path))
        indices = np.asarray([int(i) for i in indices], dtype=np.int64)
        table = self._tables["units"]
        if indices.size and not (0 <= indices.min() and indices.max() < table.n):
            total = self._catch_up("units").n          # a reader may be behind the writer
            wrong = indices[(indices < 0) | (indices >= total)]
            if wrong.size:
                raise StoreError(f"no record #{wrong[0]} (the store holds {total})", where=str(self.path))
        records: list[UnitRecord | None] = [None] * len(indices)
        order = np.argsort(indices, kind="stable")
        for group in _neighbour_groups(indices[order]):
            wanted = indices[order[group]]
            rows = table.index[int(wanted[0]):int(wanted[-1]) + 1][wanted - wanted[0]]
            for position, record in zip(order[group], _unit_records(table, rows, wanted)):
                records[position] = record
        return records

    def find(self, dut_id: str | None = None, lot: str | None = None,
             latest_only: bool = True) -> list[int]:
        """Record indices matching ``dut_id`` and/or ``lot``, oldest first.

        With ``latest_only`` (the default) superseded records are left out.
        """
        rows = self._rows("units")
        keep = _selection(rows, lot, latest_only)
        if dut_id is not None:
            keep &= rows["dut_id"] == dut_id.encode("utf-8")
        return np.flatnonzero(keep).tolist()

    def units_frame(self, lot: str | None = None, latest_only: bool = True) -> pd.DataFrame:
        """Per-unit metrics (no traces) as a DataFrame indexed by record number.

        Columns: ``dut_id, lot, serial, source, source_sha256, settings_hash, acquired_at,
        processed_at`` (UTC timestamps), ``tool_version, series, topology, elements`` (the
        JSON text), ``n_points, replaces``, every metric of :data:`METRIC_COLUMNS` and
        :data:`HEADROOM_COLUMNS` (NaN where absent), and ``pass_before`` / ``pass_after``
        (worst return loss over the band >= ``spec_rl_db``, before / after matching).
        """
        rows = self._rows("units")
        selected = np.flatnonzero(_selection(rows, lot, latest_only))
        rows = rows[selected]
        texts = _text_columns(self._tables["units"], rows, "strings")
        columns = {name: _decode_fixed(rows[name]) for name in ("dut_id", "lot", "serial")}
        columns["source"] = texts["source"]
        columns |= {name: _decode_fixed(rows[name]) for name in ("source_sha256", "settings_hash")}
        columns |= {name: _timestamps(rows[name]) for name in _UNIT_TIMES}
        columns |= {name: _decode_fixed(rows[name]) for name in ("tool_version", "series", "topology")}
        columns["elements"] = texts["elements"]
        columns["n_points"] = rows["n_points"]
        columns["replaces"] = rows["replaces"]
        for metric in METRIC_COLUMNS + HEADROOM_COLUMNS:
            columns[metric] = rows[metric] if metric in rows.dtype.names else np.full(len(rows), np.nan)
        columns["pass_before"] = columns["rl_before_worst_db"] >= columns["spec_rl_db"]
        columns["pass_after"] = columns["rl_after_worst_db"] >= columns["spec_rl_db"]
        return pd.DataFrame(columns, index=pd.Index(selected, name="record"))

    # ---- failures
    def append_failure(self, source: str, sha256: str, reason: str, lot: str = "",
                       settings_hash: str = "") -> int:
        """Log a file that could not be processed; returns the failure's index.

        The same file (by sha256, or by path when it could not be read) failing again with
        the same settings is not logged twice.
        """
        self._require_writer()
        key = _failure_key(sha256 or "", str(source), settings_hash)
        if key in self._failure_keys:
            return self._failure_keys[key]
        table = self._tables["failures"]
        rows = np.zeros(1, dtype=table.dtype)
        where = str(source)
        rows["source_sha256"] = _fixed(sha256 or "", 64, "sha256", where)
        rows["settings_hash"] = _fixed(settings_hash, 64, "settings_hash", where)
        rows["lot"] = _fixed(lot, 64, "lot", where)
        rows["failed_at"] = time.time()
        texts = {"source": str(source), "reason": " ".join(str(reason).split())}
        index = self._commit(table, rows, _texts_to_payload(table.spec, rows, [texts]))[0]
        self._failure_keys[key] = index
        return index

    def has_failure(self, sha256: str, settings_hash: str) -> bool:
        """True when this file (by content hash) already failed with these settings."""
        if self.mode == "a":
            return (sha256, settings_hash) in self._failure_keys
        rows = self._rows("failures")
        return bool(np.any((rows["source_sha256"] == sha256.encode())
                           & (rows["settings_hash"] == settings_hash.encode())))

    def failures_frame(self, lot: str | None = None) -> pd.DataFrame:
        """Failed files: ``source, source_sha256, reason, lot, settings_hash, failed_at``."""
        rows = self._rows("failures")
        table = self._tables["failures"]
        selected = np.flatnonzero(_selection(rows, lot, latest_only=False))
        rows = rows[selected]
        texts = _text_columns(table, rows, "text")
        return pd.DataFrame({
            "source": texts["source"],
            "source_sha256": _decode_fixed(rows["source_sha256"]),
            "reason": texts["reason"],
            "lot": _decode_fixed(rows["lot"]),
            "settings_hash": _decode_fixed(rows["settings_hash"]),
            "failed_at": _timestamps(rows["failed_at"]),
        }, index=pd.Index(selected, name="failure"))

    # ---- lots
    def put_lot(self, lot_id: str, summary: dict) -> None:
        """Store a lot summary (shared network, yield, tolerance analysis...).

        It supersedes earlier summaries of the same lot; storing one identical to the
        latest is a no-op (reruns do not grow the file).
        """
        self._require_writer()
        text = _to_json(summary)
        if self._lot_text(lot_id) == text:
            return
        table = self._tables["lots"]
        rows = np.zeros(1, dtype=table.dtype)
        rows["lot"] = _fixed(lot_id, 64, "lot id", str(self.path))
        rows["stored_at"] = time.time()
        self._commit(table, rows, _texts_to_payload(table.spec, rows, [{"summary": text}]))

    def get_lot(self, lot_id: str) -> dict | None:
        """The latest summary stored for ``lot_id``, or None."""
        text = self._lot_text(lot_id)
        return None if text is None else json.loads(text)

    def _lot_text(self, lot_id: str) -> str | None:
        rows = self._rows("lots")
        hits = np.flatnonzero(rows["lot"] == lot_id.encode("utf-8"))
        if not hits.size:
            return None
        last = hits[-1]
        return _text_columns(self._tables["lots"], rows[last:last + 1], "text")["summary"][0]

    def lots(self) -> list[str]:
        """Every lot id named by a unit, a failure or a lot summary, sorted."""
        ids = set()
        for group in ("units", "failures", "lots"):
            ids.update(np.unique(self._rows(group)["lot"]).tolist())
        return sorted(i.decode("utf-8") for i in ids if i)


# --------------------------------------------------------------------------- row helpers

def _trace_payload(records: list, wheres: list) -> tuple[np.ndarray, list[int]]:
    """The records' four traces end to end as one structured array, and each length."""
    columns = {name: [] for name in _TRACE_FIELDS}
    for record, where in zip(records, wheres):
        freq = np.asarray(record.freq_hz, dtype=float)
        if freq.ndim != 1 or freq.size == 0:
            raise StoreError("freq_hz must be a non-empty 1-D array", where=where)
        columns["freq_hz"].append(freq)
        for name in _TRACE_FIELDS[1:]:
            values = np.asarray(getattr(record, name), dtype=complex)
            if values.shape != freq.shape:
                raise StoreError(f"{name} has shape {values.shape}, freq_hz {freq.shape}", where=where)
            columns[name].append(values)
    lengths = [len(f) for f in columns["freq_hz"]]
    block = np.empty(sum(lengths), dtype=_TRACE_DTYPE)
    for name, parts in columns.items():
        block[name] = np.concatenate(parts)
    return block, lengths


def _record_texts(record: UnitRecord, where: str) -> dict:
    texts = {"source": str(record.source)}
    for name in _JSON_FIELDS:
        try:
            texts[name] = _to_json(getattr(record, name))
        except (TypeError, ValueError) as error:
            raise StoreError(f"{name} cannot be stored as JSON: {error}", where=where) from None
    return texts


def _neighbour_groups(sorted_indices: np.ndarray) -> list[slice]:
    """Runs of ``sorted_indices`` with gaps of at most ``_GROUP_GAP`` and at most
    ``_MAX_ROWS_PER_COMMIT`` members, so one read per run stays small."""
    breaks = np.flatnonzero(np.diff(sorted_indices) > _GROUP_GAP) + 1
    groups = []
    for start, stop in zip(np.r_[0, breaks], np.r_[breaks, len(sorted_indices)]):
        groups += [slice(a, min(a + _MAX_ROWS_PER_COMMIT, stop))
                   for a in range(int(start), int(stop), _MAX_ROWS_PER_COMMIT)]
    return groups


def _unit_records(table: _Table, rows: np.ndarray, indices: np.ndarray) -> list[UnitRecord]:
    """Full records for index ``rows`` (numbers ``indices``): one read per payload."""
    offsets, lengths = rows["traces_offset"], rows["n_points"]
    first = int(offsets.min())
    traces = table.payload_slice("traces", first, int((offsets + lengths).max()) - first)
    texts = {name: column for payload in _UNIT_TEXTS
             for name, column in _text_columns(table, rows, payload).items()}
    names = rows.dtype.names
    records = []
    for k, (row, index) in enumerate(zip(rows, indices.tolist())):
        start = int(row["traces_offset"]) - first
        trace = traces[start:start + int(row["n_points"])]
        values = {name: row[name].decode("utf-8") for name in _UNIT_STRINGS}
        values |= {name: _iso_utc(row[name]) for name in _UNIT_TIMES}
        values |= {m: float(row[m]) for m in METRIC_COLUMNS if m in names}
        values |= {name: json.loads(texts[name][k]) for name in _JSON_FIELDS}
        values |= {name: trace[name].copy() for name in _TRACE_FIELDS}
        records.append(UnitRecord(source=texts["source"][k], index=index,
                                  replaces=int(row["replaces"]), **values))
    return records


def _selection(rows: np.ndarray, lot: str | None, latest_only: bool) -> np.ndarray:
    """Boolean mask: rows of ``lot`` (all lots if None), without superseded records."""
    keep = np.ones(len(rows), dtype=bool)
    if latest_only:
        replaced = rows["replaces"]
        keep[replaced[replaced >= 0]] = False
    if lot is not None:
        keep &= rows["lot"] == lot.encode("utf-8")
    return keep


def _unit_key(record: UnitRecord) -> tuple[str, str]:
    """(source sha256, settings hash) of a record; the hash is derived if not given."""
    digest = record.settings_hash or settings_hash(
        {"config": record.config, "fixture": record.fixture, "parts": record.parts,
         "series": record.series})
    return record.source_sha256, digest


def _failure_key(sha256: str, source: str, digest: str) -> tuple[str, str]:
    return (sha256, digest) if sha256 else ("path:" + source, digest)


def _float_or_nan(value, what: str, where: str) -> float:
    if value is None:
        return _FLOAT_NAN
    if isinstance(value, bool) or not isinstance(value, (int, float, np.number)):
        raise StoreError(f"{what} must be a number or null, not {value!r}", where=where)
    return float(value)


def _timestamps(seconds: np.ndarray) -> pd.DatetimeIndex:
    """Seconds since the epoch to UTC timestamps (NaN -> NaT)."""
    return pd.to_datetime(seconds, unit="s", utc=True).as_unit("us")


def _text_columns(table: _Table, rows: np.ndarray, payload: str) -> dict:
    """Every text field ``rows`` keep in ``payload``, as lists of str, read in one go."""
    spec = next(p for p in table.spec.payloads if p.name == payload)
    names = [segment[:-len("_nbytes")] for segment in spec.segments]
    if not len(rows):
        return {name: [] for name in names}
    offsets = rows[f"{payload}_offset"]
    lengths = [rows[segment] for segment in spec.segments]
    lo = int(offsets.min())
    hi = int((offsets + sum(lengths)).max())
    blob = table.payload_slice(payload, lo, hi - lo).tobytes()
    columns = {}
    starts = offsets - lo
    for name, length in zip(names, lengths):
        ends = starts + length
        columns[name] = [blob[a:b].decode("utf-8") for a, b in zip(starts.tolist(), ends.tolist())]
        starts = ends
    return columns


def units_frame(path: str | Path, lot: str | None = None, latest_only: bool = True) -> pd.DataFrame:
    """Open ``path`` read-only (SWMR-safe) and return :meth:`ResultsStore.units_frame`."""
    with ResultsStore(path, mode="r") as store:
        return store.units_frame(lot=lot, latest_only=latest_only)
