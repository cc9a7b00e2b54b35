"""One unit through the whole pipeline: ingest -> de-embed -> band match -> a store record.

This is the shared per-unit step of every command that processes sweeps without a person
in the loop (``lot``, ``watch``, ``measure``). :class:`Settings` gathers what decides the
answer (band, z0, spec, part series and library, fixture chain); its :meth:`~Settings.digest`
is the settings hash the store uses for idempotence, so a file processed twice with the
same settings is stored once.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

import pipeline
from pipeline import metrics
from pipeline.acquire import read_sweep
from pipeline.deembed import NO_FIXTURE, FixtureChain
from pipeline.headroom import analyse_band
from pipeline.match import match_band, predicted_gamma
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


def process_file(path: str | Path, settings: Settings, *, dut_id: str | None = None) -> UnitRecord:
    """Read one Touchstone file and process it; a bad file raises a MatchbayError."""
    sweep = read_sweep(path, port=settings.port, z0=settings.z0_ohm,
                       max_bytes=settings.max_bytes, dut_id=dut_id, lot=settings.lot)
    return process_sweep(sweep, settings)


def process_sweep(raw: Sweep, settings: Settings) -> UnitRecord:
    """De-embed, band-match and measure one sweep; the record the store keeps."""
    where = raw.provenance.source or raw.provenance.dut_id
    dut = settings.fixture.apply(raw)
    z = dut.z_ohm
    solutions = match_band(dut.freq_hz, z, settings.band_hz, z0=settings.z0_ohm,
                           series=settings.series, parts=settings.parts, where=where)
    best = solutions[0]
    s11_matched = predicted_gamma(best.elements, dut.freq_hz, z, settings.z0_ohm)
    inband = dut.band_indices(settings.band_hz)
    center = 0.5 * (settings.band_hz[0] + settings.band_hz[1])
    rl_before = metrics.return_loss_db(dut.s11[inband])
    rl_after = metrics.return_loss_db(s11_matched[inband])
    headroom = analyse_band(dut.freq_hz, z, settings.band_hz, best.return_loss_db, settings.spec_rl_db)
    prov = raw.provenance
    return UnitRecord(
        dut_id=prov.dut_id, lot=settings.lot or prov.lot, serial=prov.serial,
        source=prov.source, source_sha256=prov.source_sha256, settings_hash=settings.digest(),
        acquired_at=prov.acquired_at, processed_at=_now(), tool_version=pipeline.__version__,
        config=settings.as_dict(), fixture=list(dut.provenance.fixture),
        parts=settings.parts.as_dict(), series=settings.series,
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
