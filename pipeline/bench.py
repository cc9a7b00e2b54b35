"""The bench flow on a live analyzer: acquire -> de-embed -> match -> store, one DUT at a time.

A :class:`BenchSession` wraps an open :class:`instruments.Analyzer` and a
:class:`BenchPlan` (what to sweep, how to match, where results go). Its
:meth:`~BenchSession.measure` runs one device under test through the whole pipeline:

    acquire            Analyzer.acquire: one sweep over SCPI (the analyzer names a failing step)
    de-embed, match    pipeline.process.process_sweep: fixture chain, band match, metrics
    save the raw sweep instruments.save_touchstone into --save-touchstone DIR (atomic rename)
    store              ResultsStore.append: the record is committed when it returns

Any failure raises a :class:`~pipeline.errors.MatchbayError` and leaves the store as it
was: the record is appended last, and only for a complete measurement. The store is opened
for each record and closed again (a record shown as stored is flushed and fsync'ed, and
the file is free for other writers between units), so a store that did not exist is only
created by the first successful measurement.

:func:`run_loop` is the bench loop: DUT ids come one per line from a stream (typed, or a
barcode scanner, which types a line and Enter), and each is measured and shown until an
empty line, ``q``, end of input or Ctrl-C. A failed measurement is reported and the loop
goes on to the next DUT (the operator can scan the same DUT again to retry); it is
counted in the :class:`SessionTally`. Showing is left to callbacks, so the CLI decides
how a result looks.
"""

from __future__ import annotations

import dataclasses
import re
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Callable, Iterable, Iterator, TextIO

from instruments import Analyzer, Profile, SweepSettings, save_touchstone
from pipeline.errors import ConfigError, MatchbayError
from pipeline.parts import check_series
from pipeline.process import Settings, process_sweep
from pipeline.store import ResultsStore, UnitRecord
from pipeline.units import format_si

#: The default sweep is the band widened by this fraction of its width on each side ...
SPAN_MARGIN = 0.5
#: ... but by at least this fraction of the band centre (a narrow band still shows its
#: surroundings), and it never starts below half the band's lower edge.
MIN_MARGIN_OF_CENTRE = 0.02
#: A line holding one of these (any case), or an empty line, ends the bench loop.
STOP_WORDS = frozenset({"q", "quit", "exit"})
#: Longest DUT id the store keeps (its dut_id column), UTF-8 bytes.
MAX_DUT_ID_BYTES = 128


def default_span(band_hz: tuple[float, float]) -> tuple[float, float]:
    """The sweep (start, stop) in Hz for a band: widened by :data:`SPAN_MARGIN` each side.

    902-928 MHz gives 889-941 MHz. The margin is at least :data:`MIN_MARGIN_OF_CENTRE`
    of the centre frequency, and the start is never below half the lower band edge.
    """
    lo, hi = band_hz
    margin = max(SPAN_MARGIN * (hi - lo), MIN_MARGIN_OF_CENTRE * 0.5 * (lo + hi))
    return max(lo - margin, 0.5 * lo), hi + margin


def plan_sweep(profile: Profile, band_hz: tuple[float, float], *, start_hz: float | None = None,
               stop_hz: float | None = None, points: int, ifbw_hz: float, port: int = 1,
               data_format: str | None = None, byte_order: str | None = None) -> SweepSettings:
    """What each acquisition asks of the analyzer, checked before anything is sent.

    A missing start or stop comes from :func:`default_span`; a missing data format or
    byte order is the profile's first. The sweep must cover the band (ConfigError).
    """
    default_start, default_stop = default_span(band_hz)
    settings = SweepSettings(start_hz=default_start if start_hz is None else start_hz,
                             stop_hz=default_stop if stop_hz is None else stop_hz,
                             points=points, ifbw_hz=ifbw_hz, port=port,
                             data_format=data_format or next(iter(profile.data_formats)),
                             byte_order=byte_order or next(iter(profile.byte_orders), "little"))
    profile.check_supports(settings.data_format, settings.byte_order)
    lo, hi = band_hz
    if settings.start_hz > lo or settings.stop_hz < hi:
        raise ConfigError(f"the sweep {format_si(settings.start_hz, 'Hz', 6)} to "
                          f"{format_si(settings.stop_hz, 'Hz', 6)} does not cover the band "
                          f"{format_si(lo, 'Hz', 6)} to {format_si(hi, 'Hz', 6)}", where="--start/--stop")
    return settings


def check_dut_id(text: str) -> str:
    """A DUT id as typed or scanned, stripped; ConfigError if empty, too long or not printable."""
    dut_id = text.strip()
    if not dut_id:
        raise ConfigError("a DUT id must not be empty", where="DUT id")
    if not dut_id.isprintable():
        raise ConfigError(f"DUT id {dut_id!r} holds control characters", where="DUT id")
    if len(dut_id.encode("utf-8")) > MAX_DUT_ID_BYTES:
        raise ConfigError(f"DUT id {dut_id[:20]!r}... is longer than {MAX_DUT_ID_BYTES} bytes", where="DUT id")
    return dut_id


def raw_file_name(dut_id: str, acquired_at: str) -> str:
    """``'A-017_20250314T101502.123Z.s1p'``: the DUT id (made file-name safe) and the UTC time."""
    safe = re.sub(r"[^A-Za-z0-9._-]+", "_", dut_id).strip("._") or "unit"
    when = datetime.fromisoformat(acquired_at).astimezone(timezone.utc)
    return f"{safe}_{when:%Y%m%dT%H%M%S}.{when.microsecond // 1000:03d}Z.s1p"


@dataclass(frozen=True)
class BenchPlan:
    """Everything a bench session does with each DUT.

    settings       : the matching settings (band, spec, parts, fixture, lot).
    sweep          : what the analyzer is asked for each acquisition.
    store_path     : HDF5 results store to append to (None: results are only shown).
    touchstone_dir : folder for each raw sweep as a ``.s1p`` file (None: not saved).
    """

    settings: Settings
    sweep: SweepSettings
    store_path: Path | None = None
    touchstone_dir: Path | None = None

    def check(self) -> None:
        """Refuse, before the analyzer is touched, what would fail every measurement.

        An existing store must be a matchbay store (opened read-only, not changed); a new
        one needs an existing folder. The raw-sweep folder must exist.
        """
        check_series(self.settings.series, where="--series")
        if self.store_path is not None:
            if self.store_path.exists():
                with ResultsStore(self.store_path, mode="r"):
                    pass
            elif not self.store_path.parent.is_dir():
                raise ConfigError(f"folder {str(self.store_path.parent)!r} does not exist",
                                  where=str(self.store_path))
        if self.touchstone_dir is not None and not self.touchstone_dir.is_dir():
            raise ConfigError("is not an existing folder", where=str(self.touchstone_dir))


@dataclass(frozen=True)
class Measurement:
    """One DUT measured and matched.

    record       : the store record (``extras["instrument"]``: the analyzer's identity and
                   the settings it used; ``extras["raw_touchstone"]``: the raw sweep file).
    stored_index : its record number in the store; None without a store.
    new_record   : False when a bit-identical trace was already stored with the same
                   settings (the store keeps it once): the analyzer may not have swept again.
    touchstone   : the raw sweep's ``.s1p`` file, or None.
    """

    record: UnitRecord
    stored_index: int | None = None
    new_record: bool = True
    touchstone: Path | None = None

    @property
    def attempts(self) -> int:
        """Acquisition attempts it took (more than 1: a link fault was recovered)."""
        return int(self.record.extras.get("instrument", {}).get("attempts", 1))


@dataclass
class SessionTally:
    """What a bench session did, for its closing summary.

    measured : DUTs measured and matched; of them ``passed`` / ``failed`` the spec as
               measured, and ``pass_matched`` reach it with their suggested network.
    errors   : measurements that could not be completed (nothing stored for them).
    stored   : new records appended to the store.
    interrupted : the session ended with Ctrl-C.
    """

    measured: int = 0
    passed: int = 0
    failed: int = 0
    pass_matched: int = 0
    errors: int = 0
    stored: int = 0
    interrupted: bool = False

    def count(self, measurement: Measurement) -> None:
        record = measurement.record
        self.measured += 1
        self.passed += record.pass_before
        self.failed += not record.pass_before
        self.pass_matched += record.pass_after
        self.stored += measurement.stored_index is not None and measurement.new_record


class BenchSession:
    """Measure DUTs one by one on an open analyzer, following a :class:`BenchPlan`."""

    def __init__(self, analyzer: Analyzer, plan: BenchPlan):
        self.analyzer = analyzer
        self.plan = plan

    def measure(self, dut_id: str) -> Measurement:
        """Acquire, de-embed, match, save and store one DUT.

        Raises a MatchbayError naming what failed (an InstrumentError names the
        acquisition step); nothing is stored then.
        """
        dut_id = check_dut_id(dut_id)
        plan, sweep = self.plan, self.plan.sweep
        raw = self.analyzer.acquire(sweep.start_hz, sweep.stop_hz, sweep.points, sweep.ifbw_hz, sweep.port,
                                    sweep.data_format, sweep.byte_order, dut_id=dut_id, lot=plan.settings.lot)
        record = process_sweep(raw, plan.settings)
        touchstone = None
        if plan.touchstone_dir is not None:
            touchstone = save_touchstone(raw, plan.touchstone_dir / raw_file_name(dut_id, raw.provenance.acquired_at))
            record = dataclasses.replace(record, extras={**record.extras, "raw_touchstone": str(touchstone)})
        if plan.store_path is None:
            return Measurement(record, touchstone=touchstone)
        with ResultsStore(plan.store_path, mode="a") as store:
            known = store.contains(record.source_sha256, record.settings_hash)
            index = store.append(record)
        return Measurement(record, stored_index=index, new_record=not known, touchstone=touchstone)


def read_dut_ids(stream: TextIO, prompt: Callable[[], None] | None = None) -> Iterator[str]:
    """DUT ids, one per line, until an empty line, a stop word (``q``) or end of input.

    ``prompt`` is called before each line is read (e.g. to ask the operator).
    """
    while True:
        if prompt is not None:
            prompt()
        line = stream.readline()
        text = line.strip()
        if not text or text.lower() in STOP_WORDS:
            return
        yield text


def run_loop(session: BenchSession, dut_ids: Iterable[str], *,
             on_measured: Callable[[Measurement], None],
             on_failed: Callable[[str, MatchbayError], None]) -> SessionTally:
    """Measure every DUT id in turn; a failure is reported and the loop goes on.

    Ctrl-C (KeyboardInterrupt) ends the loop cleanly; the measurement it interrupted is
    not stored. Returns the session's tally.
    """
    tally = SessionTally()
    try:
        for dut_id in dut_ids:
            try:
                measurement = session.measure(dut_id)
            except MatchbayError as error:
                tally.errors += 1
                on_failed(dut_id, error)
                continue
            tally.count(measurement)
            on_measured(measurement)
    except KeyboardInterrupt:
        tally.interrupted = True
    return tally
