"""Units through the whole pipeline: ingest -> de-embed -> band match -> a store record.

This is the shared per-unit step of every command that processes sweeps without a person
in the loop (``lot``, ``watch``, ``measure``): :func:`process_sweep` for one unit,
:func:`process_sweeps` for a batch (the lot job's workers), which matches the units of
one frequency grid together. :class:`Settings` gathers what decides the
answer (band, z0, spec, part series and library, fixture chain); its :meth:`~Settings.digest`
is the settings hash the store uses for idempotence, so a file processed twice with the
same settings is stored once.
"""

from __future__ import annotations

import datetime as _dt
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

import pipeline
from pipeline import metrics
from pipeline.acquire import read_sweep
from pipeline.deembed import NO_FIXTURE, FixtureChain
from pipeline.errors import MatchbayError
from pipeline.headroom import analyse_band_many
from pipeline.match import band_points, match_band_many, predicted_gamma_many
from pipeline.parts import PartLibrary, load_parts
from pipeline.store import UnitRecord, settings_hash
from pipeline.sweep import Sweep


@dataclass(frozen=True)
class Settings:
    """Everything that decides a unit's result. SI units; band in Hz."""

    band_hz: tuple[float, float]
    z0_ohm: float = 50.0
    spec_rl_db: float = 10.0
    series: str = "E24"
    parts: PartLibrary = field(default_factory=lambda: load_parts("ideal"))
    fixture: FixtureChain = NO_FIXTURE
    port: int = 1
    max_bytes: int = 200 * 1024 ** 2
    lot: str = ""

    def as_dict(self) -> dict:
        """JSON-ready description, stored with every record."""
        return {
            "band_hz": [float(self.band_hz[0]), float(self.band_hz[1])],
            "z0_ohm": float(self.z0_ohm),
            "spec_rl_db": float(self.spec_rl_db),
            "series": self.series,
            "parts": self.parts.as_dict(),
            "fixture": self.fixture.describe(),
            "port": int(self.port),
        }

    def digest(self) -> str:
        """Stable hash of the settings that change a result (not the lot name)."""
        return settings_hash(self.as_dict())


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def read_unit(path: str | Path, settings: Settings, *, dut_id: str | None = None) -> Sweep:
    """Read one Touchstone file as the settings ask (port, z0, size limit, lot)."""
    return read_sweep(path, port=settings.port, z0=settings.z0_ohm, max_bytes=settings.max_bytes,
                      dut_id=dut_id, lot=settings.lot)


def process_file(path: str | Path, settings: Settings, *, dut_id: str | None = None) -> UnitRecord:
    """Read one Touchstone file and process it; a bad file raises a MatchbayError."""
    return process_sweep(read_unit(path, settings, dut_id=dut_id), settings)


def process_sweep(raw: Sweep, settings: Settings) -> UnitRecord:
    """De-embed, band-match and measure one sweep; the record the store keeps.

    The one-unit case of :func:`process_sweeps`; a problem raises its MatchbayError.
    """
    (result,) = process_sweeps([raw], settings)
    if isinstance(result, MatchbayError):
        raise result
    return result


def process_sweeps(raws: list[Sweep], settings: Settings) -> list[UnitRecord | MatchbayError]:
    """De-embed, band-match and measure many sweeps; per sweep its record or its error.

    The units measured on one frequency grid (a lot nearly always shares one) are
    de-embedded, matched and analysed together (:meth:`FixtureChain.apply_many`,
    :func:`pipeline.match.match_band_many`, :func:`pipeline.headroom.analyse_band_many`),
    which gives each the record it would get alone at a fraction of the cost. A unit
    that cannot be processed (e.g. its sweep misses the band) gets its MatchbayError;
    the others are not affected.
    """
    groups: dict[tuple, list[int]] = {}
    for i, raw in enumerate(raws):
        groups.setdefault((raw.freq_hz.tobytes(), raw.z0_ohm), []).append(i)
    shared = _SharedFields.of(settings)
    results: list = [None] * len(raws)
    for members in groups.values():
        group = [raws[i] for i in members]
        duts = settings.fixture.apply_many(group)
        good = [u for u, dut in enumerate(duts) if not isinstance(dut, MatchbayError)]
        outcomes = list(duts)
        if good:
            records = _process_group([group[u] for u in good], [duts[u] for u in good], settings, shared)
            for u, record in zip(good, records):
                outcomes[u] = record
        for i, outcome in zip(members, outcomes):
            results[i] = outcome
    return results


@dataclass(frozen=True)
class _SharedFields:
    """What every record of one settings carries, computed once per call: the records of
    one call hold the same ``config`` and ``parts`` dicts (records are values, not
    modified once made; pickling them for the store sends each dict once per batch)."""

    digest: str
    config: dict
    parts: dict

    @classmethod
    def of(cls, settings: Settings) -> "_SharedFields":
        return cls(settings.digest(), settings.as_dict(), settings.parts.as_dict())


def _where(raw: Sweep) -> str:
    return raw.provenance.source or raw.provenance.dut_id


def _process_group(raws: list[Sweep], duts: list[Sweep], settings: Settings,
                   shared: _SharedFields) -> list[UnitRecord | MatchbayError]:
    """Records (or errors) of de-embedded units that share one frequency grid."""
    freq_hz = duts[0].freq_hz
    z = np.stack([dut.z_ohm for dut in duts])
    results = _match_group(freq_hz, z, [_where(raw) for raw in raws], settings)
    ok = [u for u, r in enumerate(results) if not isinstance(r, MatchbayError)]
    if not ok:
        return results
    best = [results[u][0] for u in ok]
    try:
        headrooms = analyse_band_many(freq_hz, z[ok], settings.band_hz,
                                      [b.return_loss_db for b in best], settings.spec_rl_db)
    except MatchbayError as error:
        headrooms = [error] * len(ok)
    matched = predicted_gamma_many([b.elements for b in best], freq_hz, z[ok], settings.z0_ohm)
    for u, solution, headroom, s11_matched in zip(ok, best, headrooms, matched):
        results[u] = headroom if isinstance(headroom, MatchbayError) else \
            _record(raws[u], duts[u], solution, s11_matched, headroom, settings, shared)
    return results


def _match_group(freq_hz: np.ndarray, z: np.ndarray, places: list[str],
                 settings: Settings) -> list:
    """Per unit, its band solutions or its MatchbayError.

    All units are matched together; when that fails, each unit's band points are
    checked alone (cheap) to find the bad ones, and the rest are matched together again.
    """
    def match(units):
        return match_band_many(freq_hz, z[units], settings.band_hz, z0=settings.z0_ohm,
                               series=settings.series, parts=settings.parts,
                               where=[places[u] for u in units])

    everyone = list(range(len(places)))
    try:
        return match(everyone)
    except MatchbayError:
        pass
    results: list = [None] * len(places)
    for u in everyone:
        try:
            band_points(freq_hz, z[u], settings.band_hz, settings.z0_ohm, places[u])
        except MatchbayError as error:
            results[u] = error
    good = [u for u in everyone if results[u] is None]
    if good:
        try:
            solutions = match(good)
        except MatchbayError as error:
            solutions = [error] * len(good)
        for u, found in zip(good, solutions):
            results[u] = found
    return results


def _record(raw: Sweep, dut: Sweep, best, s11_matched: np.ndarray, headroom, settings: Settings,
            shared: _SharedFields) -> UnitRecord:
    """The store record of one unit: provenance, traces, its best network (with its
    predicted S11 ``s11_matched``), metrics."""
    inband = dut.band_indices(settings.band_hz)
    center = 0.5 * (settings.band_hz[0] + settings.band_hz[1])
    rl_before = metrics.return_loss_db(dut.s11[inband])
    prov = raw.provenance
    return UnitRecord(
        dut_id=prov.dut_id, lot=settings.lot or prov.lot, serial=prov.serial,
        source=prov.source, source_sha256=prov.source_sha256, settings_hash=shared.digest,
        acquired_at=prov.acquired_at, processed_at=_now(), tool_version=pipeline.__version__,
        config=shared.config, fixture=list(dut.provenance.fixture),
        parts=shared.parts, series=settings.series,
        band_lo_hz=float(settings.band_hz[0]), band_hi_hz=float(settings.band_hz[1]),
        z0_ohm=float(settings.z0_ohm), spec_rl_db=float(settings.spec_rl_db),
        freq_hz=dut.freq_hz, s11_raw=raw.s11, s11_dut=dut.s11, s11_matched=s11_matched,
        elements=[e.as_dict() for e in best.elements], topology=best.topology,
        rl_before_worst_db=float(np.min(rl_before)),
        rl_before_center_db=float(np.interp(center, dut.freq_hz, metrics.return_loss_db(dut.s11))),
        rl_after_worst_db=float(best.return_loss_db),
        rl_after_center_db=float(best.return_loss_center_db),
        bw_before_hz=metrics.bandwidth_at_spec(dut.freq_hz, dut.s11, settings.spec_rl_db, center),
        bw_after_hz=metrics.bandwidth_at_spec(dut.freq_hz, s11_matched, settings.spec_rl_db, center),
        delivered_fraction_min=float(best.delivered_fraction_min),
        headroom=headroom.as_dict(),
        extras={"instrument": prov.instrument} if prov.instrument else {},
    )
