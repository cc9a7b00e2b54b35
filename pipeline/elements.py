"""Lumped parts: what one element of a matching network is, and its impedance.

An :class:`Element` is one part at one place in the ladder (``series`` or ``shunt``),
``inductor`` or ``capacitor``, with a value in H or F and the :class:`PartModel` it was
evaluated with. The models (all optional; absent means ideal):

* inductor: series resistance from its Q at ``q_ref_hz``, growing with sqrt(f) (skin
  effect): ``R(f) = 2*pi*q_ref_hz*L/q * sqrt(f/q_ref_hz)``; self-resonance ``srf_hz`` as a
  capacitance ``Cp = 1/((2*pi*srf_hz)**2 * L)`` across the lossy inductor.
* capacitor: a constant series resistance ``esr_ohm``, or one derived from its Q at
  ``q_ref_hz`` (``ESR = 1/(2*pi*q_ref_hz*C*q)``); self-resonance as a series inductance
  ``Ls = 1/((2*pi*srf_hz)**2 * C)``.

These are the models the interfaces contract names (q, q_ref_hz, esr_ohm, srf_hz), so
anyone holding the JSON can recompute a prediction.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

POSITIONS = ("series", "shunt")
KINDS = ("inductor", "capacitor")


@dataclass(frozen=True)
class PartModel:
    """Non-ideal behaviour of one part; every field None means an ideal part."""

    q: float | None = None
    q_ref_hz: float | None = None
    esr_ohm: float | None = None
    srf_hz: float | None = None

    @property
    def is_ideal(self) -> bool:
        return self.q is None and self.esr_ohm is None and self.srf_hz is None

    def as_dict(self) -> dict:
        """The model's keys for the JSON element (absent keys for ideal behaviour)."""
        return {k: v for k, v in (("q", self.q), ("q_ref_hz", self.q_ref_hz),
                                  ("esr_ohm", self.esr_ohm), ("srf_hz", self.srf_hz))
                if v is not None}


@dataclass(frozen=True)
class Element:
    """One part of a ladder network, listed from the source port toward the load."""

    position: str           # "series" | "shunt"
    kind: str               # "inductor" | "capacitor"
    value: float            # H for an inductor, F for a capacitor
    model: PartModel = field(default_factory=PartModel)

    def __post_init__(self):
        if self.position not in POSITIONS:
            raise ValueError(f"position must be one of {POSITIONS}, not {self.position!r}")
        if self.kind not in KINDS:
            raise ValueError(f"kind must be one of {KINDS}, not {self.kind!r}")

    def impedance(self, freq_hz) -> np.ndarray:
        """Complex impedance of the part alone (ohm) at ``freq_hz``."""
        m = self.model
        return part_impedance(self.kind, self.value, freq_hz, q=m.q, q_ref_hz=m.q_ref_hz,
                              esr_ohm=m.esr_ohm, srf_hz=m.srf_hz)

    @classmethod
    def from_dict(cls, d: dict) -> "Element":
        """The element back from its :meth:`as_dict` form (e.g. as stored)."""
        model = PartModel(**{k: float(d[k]) for k in ("q", "q_ref_hz", "esr_ohm", "srf_hz") if k in d})
        return cls(d["position"], d["kind"], float(d["value"]), model)

    def as_dict(self) -> dict:
        """JSON shape of ../shared/interfaces.md: position, kind, value, model keys."""
        return {"position": self.position, "kind": self.kind, "value": float(self.value),
                **self.model.as_dict()}


def part_impedance(kind: str, value, freq_hz, *, q=None, q_ref_hz=None, esr_ohm=None,
                   srf_hz=None) -> np.ndarray:
    """Impedance (ohm) of an inductor or capacitor, vectorised.

    ``value``, ``freq_hz`` and the model parameters broadcast against each other (numpy
    rules), so a grid of candidate values times a frequency axis is one call. A model
    parameter of None (or NaN in an array) means that effect is absent.

    The models are written so that the values and parameters (the small arrays) are
    combined first, their NaNs set to "absent" there, and each term meets the frequency
    axis once (w = 2 pi f):

    * inductor: per henry ``A = jw + k sqrt(w)`` with ``k = sqrt(w_ref) / q`` (the loss
      ``R = L k sqrt(w)``); with the parallel ``Cp = 1/(w_srf**2 L)`` of self-resonance,
      ``Z = L A / (1 + jw Cp L A) = L A / (1 + jw A / w_srf**2)``;
    * capacitor: ``Z = (1/jw) (1/C) + ESR + jw Ls`` with ``ESR = esr_ohm`` or
      ``1/(w_ref C q)`` and the series ``Ls = 1/(w_srf**2 C)`` of self-resonance.
    """
    value = np.asarray(value, dtype=float)
    w = 2 * np.pi * np.asarray(freq_hz, dtype=float)
    jw = 1j * w
    if kind == "inductor":
        per_henry = jw                                   # A = Z / L without self-resonance
        if q is not None:
            k = _absent_as_zero(np.sqrt(2 * np.pi * np.asarray(q_ref_hz, dtype=float)) / np.asarray(q, dtype=float))
            per_henry = jw + k * np.sqrt(w)
        z = value * per_henry
        if srf_hz is not None:
            inv_w_srf2 = _absent_as_zero(1 / (2 * np.pi * np.asarray(srf_hz, dtype=float)) ** 2)
            z = z / (1 + (jw * per_henry) * inv_w_srf2)
        return z
    if kind == "capacitor":
        z = (1 / jw) * (1 / value)
        if esr_ohm is not None:
            z = z + _absent_as_zero(np.asarray(esr_ohm, dtype=float))
        elif q is not None:
            w_ref = 2 * np.pi * np.asarray(q_ref_hz, dtype=float)
            z = z + _absent_as_zero(1 / (w_ref * value * np.asarray(q, dtype=float)))
        if srf_hz is not None:
            w_srf = 2 * np.pi * np.asarray(srf_hz, dtype=float)
            z = z + jw * _absent_as_zero(1 / (w_srf ** 2 * value))       # j w Ls
        return z
    raise ValueError(f"kind must be one of {KINDS}, not {kind!r}")


def _absent_as_zero(term) -> np.ndarray:
    """A model term of the small (value / parameter) arrays with NaN (effect absent) as 0."""
    return np.where(np.isnan(term), 0.0, term)
