"""Figures of merit of a reflection coefficient: return loss, VSWR, mismatch loss.

Definitions (Pozar, Microwave Engineering 4th ed., Sec. 2.3): return loss
RL = -20 log10|Gamma| in dB, a positive number; VSWR = (1 + |Gamma|)/(1 - |Gamma|);
mismatch loss ML = -10 log10(1 - |Gamma|^2) (common practice).
"""

from __future__ import annotations

import numpy as np

_TINY = 1e-15       # |Gamma| floor so a perfect match reads 300 dB, not inf


def return_loss_db(gamma) -> np.ndarray:
    """Return loss in dB (positive) of reflection coefficient(s) ``gamma``."""
    return -20 * np.log10(np.maximum(np.abs(gamma), _TINY))


def vswr(gamma) -> np.ndarray:
    """Voltage standing-wave ratio; inf for |Gamma| >= 1."""
    mag = np.abs(gamma)
    with np.errstate(divide="ignore"):
        return np.where(mag < 1, (1 + mag) / (1 - mag), np.inf)


def mismatch_loss_db(gamma) -> np.ndarray:
    """Mismatch loss in dB: the power lost to reflection, -10 log10(1 - |Gamma|^2)."""
    with np.errstate(divide="ignore"):
        return -10 * np.log10(np.maximum(1 - np.abs(gamma) ** 2, 0.0))


def gamma_from_return_loss(rl_db) -> np.ndarray:
    """|Gamma| for a return loss in dB."""
    return 10 ** (-np.asarray(rl_db, dtype=float) / 20)


def bandwidth_at_spec(freq_hz, gamma, spec_rl_db: float, center_hz: float) -> float:
    """Width (Hz) of the contiguous run of points around ``center_hz`` meeting the spec.

    Counts measured points with RL >= spec on both sides of the point nearest the centre;
    0.0 when that point itself fails. Resolution is the sweep's point spacing.
    """
    f = np.asarray(freq_hz, dtype=float)
    ok = return_loss_db(gamma) >= spec_rl_db
    i = int(np.argmin(np.abs(f - center_hz)))
    if not ok[i]:
        return 0.0
    lo = i
    while lo > 0 and ok[lo - 1]:
        lo -= 1
    hi = i
    while hi < f.size - 1 and ok[hi + 1]:
        hi += 1
    return float(f[hi] - f[lo])
