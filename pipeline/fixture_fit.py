"""Fitting a port extension from a sweep of the fixture left open (or shorted).

With the fixture open (or shorted) where the antenna will be, the analyzer sees the
standard's reflection through the fixture twice:

    S11_meas(f) = Gamma_std(f) * 10**(-2 L(f) / 20) * exp(-j 2 w tau)

so, after dividing out the standard's own reflection, the unwrapped phase is a straight
line of slope -4 pi tau (in rad per Hz) and the magnitude gives the one-way loss
L(f) = -10 log10|S11_meas / Gamma_std|, fitted as L_dc + (L_ref - L_dc) sqrt(f / f_ref),
the port-extension loss model of :class:`pipeline.deembed.PortExtension`.

The standards (ideal, real z0): a short is Gamma = -1; an open with fringing capacitance
C is Gamma = (1 - j w C z0) / (1 + j w C z0) (|Gamma| = 1; it looks like an extra delay
of about C z0, 1 ps for 20 fF at 50 ohm, so give C where it is known).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.optimize import lsq_linear

from pipeline.deembed import PortExtension
from pipeline.errors import ConfigError
from pipeline.units import format_si

STANDARDS = ("open", "short")
MAX_PHASE_OFFSET_DEG = 90.0     # beyond this the standard is not the one declared
MAX_PHASE_RESIDUAL_DEG = 90.0   # beyond this the phase is not a line (or the sweep too coarse)
NEGATIVE_DELAY_SLACK_S = 1e-12  # a fitted delay this little below 0 is noise, read as 0


@dataclass(frozen=True)
class PortExtensionFit:
    """A fitted port extension and how well the model fits the sweep.

    extension        : the fitted :class:`PortExtension` (one-way delay and loss).
    phase_rms_deg    : RMS of the phase residual, degrees (ripple from a mismatched
                       fixture, noise, a wrong fringing capacitance).
    loss_rms_db      : RMS of the one-way loss residual, dB.
    phase_offset_deg : the fitted phase line at 0 Hz, wrapped to (-180, 180]; near 0
                       for the right standard.
    """

    extension: PortExtension
    phase_rms_deg: float
    loss_rms_db: float
    phase_offset_deg: float
    standard: str
    fringe_c_f: float
    freq_lo_hz: float
    freq_hi_hz: float
    points: int

    def as_comments(self) -> tuple[str, ...]:
        """Lines for the header of a written chain file."""
        return (f"port extension fitted from a sweep of the fixture left {self.standard}"
                + (f" (fringing capacitance {format_si(self.fringe_c_f, 'F', 4)})" if self.fringe_c_f else ""),
                f"sweep {format_si(self.freq_lo_hz, 'Hz', 6)} to {format_si(self.freq_hi_hz, 'Hz', 6)}, "
                f"{self.points} points",
                f"residuals: phase {self.phase_rms_deg:.3g} deg RMS, loss {self.loss_rms_db:.3g} dB RMS, "
                f"phase offset at 0 Hz {self.phase_offset_deg:.3g} deg",
                "loss: one-way loss of the fixture, dB (the reflection sees it twice)")


def standard_reflection(freq_hz, standard: str, fringe_c_f: float = 0.0, z0: float = 50.0) -> np.ndarray:
    """Reflection of the ideal standard at the fixture's far end (see module docstring)."""
    f = np.asarray(freq_hz, dtype=float)
    if standard == "short":
        if fringe_c_f:
            raise ConfigError("a fringing capacitance applies to an open, not a short", key="fringe_c_f")
        return -np.ones(f.shape, dtype=complex)
    if standard == "open":
        if fringe_c_f < 0:
            raise ConfigError(f"must not be negative, got {fringe_c_f:g}", key="fringe_c_f")
        x = 2j * np.pi * f * fringe_c_f * z0
        return (1 - x) / (1 + x)
    raise ConfigError(f"unknown standard {standard!r} (allowed: {', '.join(STANDARDS)})", key="standard")


def _fit_delay(freq_hz: np.ndarray, ratio: np.ndarray) -> tuple[float, float, float]:
    """(tau_s, phase offset at 0 Hz in rad wrapped, RMS phase residual rad)."""
    phase = np.unwrap(np.angle(ratio))
    slope, intercept = np.polyfit(freq_hz, phase, 1)
    residual = phase - (slope * freq_hz + intercept)
    if np.degrees(np.max(np.abs(residual))) > MAX_PHASE_RESIDUAL_DEG:
        raise ConfigError("the phase does not follow a delay (residual above "
                          f"{MAX_PHASE_RESIDUAL_DEG:.0f} deg): is the fixture open/shorted at its far end, "
                          "and does the phase turn less than 180 deg between points?")
    offset = float(np.angle(np.exp(1j * intercept)))
    return -slope / (4 * np.pi), offset, float(np.sqrt(np.mean(residual ** 2)))


_LOSS_FLOOR_DB = 1e-9      # fitted loss terms below this are reported as 0 dB


def _fit_loss(freq_hz: np.ndarray, ratio: np.ndarray, loss_ref_hz: float) -> tuple[float, float, float]:
    """(loss_db_dc, loss_db_at_ref, RMS residual dB): L = a + b sqrt(f/f_ref), a, b >= 0."""
    one_way_db = -10 * np.log10(np.abs(ratio))
    basis = np.column_stack([np.ones_like(freq_hz), np.sqrt(freq_hz / loss_ref_hz)])
    result = lsq_linear(basis, one_way_db, bounds=(0.0, np.inf))
    # A term at its zero bound comes back as ~1e-22 from the solver: that is exactly 0 dB.
    a, b = (0.0 if v < _LOSS_FLOOR_DB else float(v) for v in result.x)
    residual = one_way_db - basis @ np.array([a, b])
    return a, a + b, float(np.sqrt(np.mean(residual ** 2)))


def fit_port_extension(freq_hz, s11_open_or_short, standard: str = "open", fringe_c_f: float = 0.0,
                       z0: float = 50.0, loss_ref_hz: float | None = None) -> PortExtensionFit:
    """Estimate a port extension's one-way delay and loss from an open or short sweep.

    freq_hz           : (N,) rising frequencies, Hz (N >= 3).
    s11_open_or_short : (N,) complex S11 of the fixture with the standard at its far end.
    standard          : "open" or "short".
    fringe_c_f        : the open's fringing capacitance, F (0 for an ideal open).
    z0                : reference impedance of the sweep, ohm.
    loss_ref_hz       : frequency the fitted loss is stated at (default: the sweep's top).

    The delay comes from a least-squares line through the unwrapped phase, the loss from a
    bounded least-squares fit (scipy ``lsq_linear``, both terms >= 0) of the magnitude.
    """
    f = np.asarray(freq_hz, dtype=float)
    s = np.asarray(s11_open_or_short, dtype=complex)
    if f.ndim != 1 or s.shape != f.shape or f.size < 3:
        raise ConfigError("need at least 3 points of frequency and S11 of equal length")
    ratio = s / standard_reflection(f, standard, fringe_c_f, z0)
    tau, offset, phase_rms = _fit_delay(f, ratio)
    if np.degrees(abs(offset)) > MAX_PHASE_OFFSET_DEG:
        other = {"open": "a short", "short": "an open"}[standard]
        raise ConfigError(f"the phase extrapolates to {np.degrees(offset):.0f} deg at 0 Hz, not 0: "
                          f"this looks like {other}, not the {standard} declared", key="standard")
    if tau < -NEGATIVE_DELAY_SLACK_S:
        raise ConfigError(f"the fitted delay is negative ({tau * 1e12:.1f} ps): the standard sits "
                          "before the calibrated reference plane; check the calibration")
    ref = float(f[-1]) if loss_ref_hz is None else float(loss_ref_hz)
    loss_dc, loss_ref, loss_rms = _fit_loss(f, ratio, ref)
    extension = PortExtension(max(tau, 0.0), loss_dc, loss_ref, ref)
    return PortExtensionFit(extension=extension, phase_rms_deg=float(np.degrees(phase_rms)),
                            loss_rms_db=loss_rms, phase_offset_deg=float(np.degrees(offset)),
                            standard=standard, fringe_c_f=float(fringe_c_f),
                            freq_lo_hz=float(f[0]), freq_hi_hz=float(f[-1]), points=int(f.size))
