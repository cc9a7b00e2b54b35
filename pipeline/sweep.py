"""The Sweep: the one object that travels from acquisition to the store.

A Sweep holds a one-port reflection measurement: frequencies in Hz (strictly rising),
the complex reflection coefficient S11 at a real reference impedance ``z0_ohm``, and
where it came from (:class:`Provenance`). De-embedding returns a new Sweep whose
provenance lists the fixture steps applied, so a result always says what was removed.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np

from pipeline.errors import InputFileError


@dataclass(frozen=True)
class Provenance:
    """Where a sweep came from and what was done to it.

    ``fixture`` is the de-embedding chain applied so far, in order from the analyzer
    port toward the device: a tuple of plain dicts (JSON-ready), each with a ``type`` key.
    ``instrument`` holds the analyzer identity and settings for live sweeps.
    """

    dut_id: str = ""
    lot: str = ""
    serial: str = ""
    source: str = ""
    source_sha256: str = ""
    acquired_at: str = ""          # ISO 8601, UTC
    port: int = 1                  # the reflection S_pp taken from an N-port file
    instrument: dict = field(default_factory=dict)
    fixture: tuple = ()

    def as_dict(self) -> dict:
        d = dataclasses.asdict(self)
        d["fixture"] = list(self.fixture)
        return d


@dataclass(frozen=True)
class Sweep:
    """A one-port reflection sweep.

    freq_hz : (N,) float, strictly rising, Hz.
    s11     : (N,) complex, reflection coefficient at ``z0_ohm`` (power-wave definition,
              real z0, so it equals the textbook (Z - z0)/(Z + z0)).
    z0_ohm  : real reference impedance, ohm.
    """

    freq_hz: np.ndarray
    s11: np.ndarray
    z0_ohm: float = 50.0
    provenance: Provenance = field(default_factory=Provenance)

    def __post_init__(self):
        f = np.asarray(self.freq_hz, dtype=float)
        s = np.asarray(self.s11, dtype=complex)
        object.__setattr__(self, "freq_hz", f)
        object.__setattr__(self, "s11", s)
        where = self.provenance.source or "sweep"
        if f.ndim != 1 or s.shape != f.shape:
            raise InputFileError(f"frequency and S11 arrays differ in shape ({f.shape} vs {s.shape})", where=where)
        if f.size == 0:
            raise InputFileError("no data points", where=where)
        if not (np.all(np.isfinite(f)) and np.all(np.isfinite(s))):
            raise InputFileError("NaN or infinite value in the data", where=where)
        if np.any(np.diff(f) <= 0):
            raise InputFileError("frequencies are not strictly rising", where=where)
        if not self.z0_ohm > 0:
            raise InputFileError(f"reference impedance {self.z0_ohm} ohm must be positive", where=where)

    @property
    def z_ohm(self) -> np.ndarray:
        """Load impedance seen at the reference plane, ohm: z0 (1 + S11)/(1 - S11)."""
        return self.z0_ohm * (1 + self.s11) / (1 - self.s11)

    def replace(self, **changes) -> "Sweep":
        """A copy with some fields changed (``s11=...``, ``provenance=...``)."""
        return dataclasses.replace(self, **changes)

    def with_fixture_step(self, s11: np.ndarray, step: dict) -> "Sweep":
        """The sweep after one de-embedding step: new S11, the step appended to provenance."""
        prov = dataclasses.replace(self.provenance, fixture=self.provenance.fixture + (dict(step),))
        return dataclasses.replace(self, s11=s11, provenance=prov)

    def to_network(self):
        """The sweep as a one-port ``skrf.Network`` (for cascades, plotting, Touchstone)."""
        import skrf

        freq = skrf.Frequency.from_f(self.freq_hz, unit="Hz")
        name = self.provenance.dut_id or "sweep"
        return skrf.Network(frequency=freq, s=self.s11.reshape(-1, 1, 1), z0=self.z0_ohm, name=name)

    def band_indices(self, band_hz: tuple[float, float]) -> np.ndarray:
        """Indices of the measured points inside ``[f_lo, f_hi]``."""
        lo, hi = band_hz
        return np.flatnonzero((self.freq_hz >= lo) & (self.freq_hz <= hi))
