"""Real parts: IEC 60063 preferred values and part libraries (ranges, tolerances, models).

Preferred values
    The E-series of IEC 60063:2015 (E3 ... E24 with two significant digits, E48 ... E192
    with three) are stored as the standard's tables, not computed: E6, E12 and E24 differ
    from round(10**(i/n)) at several places (E24 has 3.0, 3.3, 4.7 ... where the formula
    gives 2.9, 3.2, 4.6) and E192 has 9.20 where the formula gives 9.19. "Nearest" always
    means nearest by *ratio* (distance in log10), so 1.345 snaps to 1.5 in E12, not 1.2:
    the geometric midpoint of 1.2 and 1.5 is 1.342. The series name ``"ideal"`` means no
    snapping: any value is allowed.

Part libraries
    A TOML file under ``configs/parts/`` describes one family of parts per kind
    (``[inductor]``, ``[capacitor]``): the values that exist (``min``/``max``, SI), the
    tolerance (relative, with an optional absolute tolerance for small values) and the
    non-ideal model. Keys (SI units)::

        description = "text"
        [inductor]
        min = 1.0e-9            # H, smallest value of the family
        max = 270e-9            # H, largest value
        tolerance = 0.05        # relative, +-5 %
        tolerance_abs = 0.3e-9  # optional: +-0.3 nH for values below tolerance_abs_below
        tolerance_abs_below = 6.0e-9
        q = 35.0                # optional: Q at q_ref_hz (series R grows with sqrt(f))
        q_ref_hz = 1.0e9
        cp_f = 0.07e-12         # optional: parallel capacitance -> srf = 1/(2 pi sqrt(L Cp))
        [capacitor]
        min, max, tolerance, tolerance_abs, tolerance_abs_below as above (F)
        esr_ohm = 0.3           # optional: series resistance, or q with q_ref_hz instead
        esl_h = 0.4e-9          # optional: series inductance -> srf = 1/(2 pi sqrt(ESL C))

    The models are the ones of :mod:`pipeline.elements` (``PartModel``), so each chosen
    part carries ``q``/``q_ref_hz``/``esr_ohm``/``srf_hz`` and anyone can recompute it.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from pipeline.config import check_keys, load_toml, resolve
from pipeline.elements import KINDS, PartModel
from pipeline.errors import ConfigError

# IEC 60063:2015 Table 1 (E3-E24, two significant digits) and Table 2 (E48-E192, three),
# as integers: mantissa * 10 (E3-E24) or * 100 (E48-E192). Source: ../shared/reference/
# REFERENCES.md section 2 (cross-checked there against the tables of the eseries 1.2.1 package).
_E_TABLES: dict[str, tuple[int, ...]] = {
    "E3": (10, 22, 47),
    "E6": (10, 15, 22, 33, 47, 68),
    "E12": (10, 12, 15, 18, 22, 27, 33, 39, 47, 56, 68, 82),
    "E24": (10, 11, 12, 13, 15, 16, 18, 20, 22, 24, 27, 30, 33, 36, 39, 43, 47, 51, 56,
            62, 68, 75, 82, 91),
    "E48": (100, 105, 110, 115, 121, 127, 133, 140, 147, 154, 162, 169, 178, 187, 196,
            205, 215, 226, 237, 249, 261, 274, 287, 301, 316, 332, 348, 365, 383, 402,
            422, 442, 464, 487, 511, 536, 562, 590, 619, 649, 681, 715, 750, 787, 825,
            866, 909, 953),
    "E96": (100, 102, 105, 107, 110, 113, 115, 118, 121, 124, 127, 130, 133, 137, 140,
            143, 147, 150, 154, 158, 162, 165, 169, 174, 178, 182, 187, 191, 196, 200,
            205, 210, 215, 221, 226, 232, 237, 243, 249, 255, 261, 267, 274, 280, 287,
            294, 301, 309, 316, 324, 332, 340, 348, 357, 365, 374, 383, 392, 402, 412,
            422, 432, 442, 453, 464, 475, 487, 499, 511, 523, 536, 549, 562, 576, 590,
            604, 619, 634, 649, 665, 681, 698, 715, 732, 750, 768, 787, 806, 825, 845,
            866, 887, 909, 931, 953, 976),
    "E192": (100, 101, 102, 104, 105, 106, 107, 109, 110, 111, 113, 114, 115, 117, 118,
             120, 121, 123, 124, 126, 127, 129, 130, 132, 133, 135, 137, 138, 140, 142,
             143, 145, 147, 149, 150, 152, 154, 156, 158, 160, 162, 164, 165, 167, 169,
             172, 174, 176, 178, 180, 182, 184, 187, 189, 191, 193, 196, 198, 200, 203,
             205, 208, 210, 213, 215, 218, 221, 223, 226, 229, 232, 234, 237, 240, 243,
             246, 249, 252, 255, 258, 261, 264, 267, 271, 274, 277, 280, 284, 287, 291,
             294, 298, 301, 305, 309, 312, 316, 320, 324, 328, 332, 336, 340, 344, 348,
             352, 357, 361, 365, 370, 374, 379, 383, 388, 392, 397, 402, 407, 412, 417,
             422, 427, 432, 437, 442, 448, 453, 459, 464, 470, 475, 481, 487, 493, 499,
             505, 511, 517, 523, 530, 536, 542, 549, 556, 562, 569, 576, 583, 590, 597,
             604, 612, 619, 626, 634, 642, 649, 657, 665, 673, 681, 690, 698, 706, 715,
             723, 732, 741, 750, 759, 768, 777, 787, 796, 806, 816, 825, 835, 845, 856,
             866, 876, 887, 898, 909, 920, 931, 942, 953, 965, 976, 988),
}

E_SERIES_NAMES: tuple[str, ...] = tuple(_E_TABLES)
"""The IEC 60063 series, coarsest first."""

SERIES_NAMES: tuple[str, ...] = ("ideal",) + E_SERIES_NAMES
"""Every accepted ``series`` value: ``"ideal"`` (no snapping) and the E-series."""

# Decades covered by the cached value tables: 1e-18 .. 1e6 (aF .. MH/MF, or ohms).
_DECADES = range(-18, 7)


def check_series(series: str, *, where: str = "series") -> str:
    """The canonical series name (``'e24'`` -> ``'E24'``); ConfigError if unknown."""
    canonical = "ideal" if str(series).lower() == "ideal" else str(series).upper()
    if canonical not in SERIES_NAMES:
        raise ConfigError(f"unknown part series {series!r} (known: {', '.join(SERIES_NAMES)})",
                          where=where)
    return canonical


def mantissas(series: str) -> np.ndarray:
    """The IEC 60063 table of ``series`` as values in [1, 10), e.g. E24 -> 1.0 ... 9.1."""
    table = _E_TABLES[check_series(series)]
    scale = 10 if table[0] == 10 else 100
    return np.array(table, dtype=float) / scale


@functools.lru_cache(maxsize=None)
def _all_values(series: str) -> np.ndarray:
    """Every value of ``series`` over :data:`_DECADES`, sorted (read-only array).

    Each value is formed from its decimal digits (``float('39e-9')``) so that 39 nH is
    exactly the float a user writes as 39e-9.
    """
    table = _E_TABLES[series]
    digits = 1 if table[0] == 10 else 2
    values = np.array([float(f"{m}e{d - digits}") for d in _DECADES for m in table])
    values.setflags(write=False)
    return values


def _e_values(series: str) -> np.ndarray:
    name = check_series(series)
    if name == "ideal":
        raise ValueError("the 'ideal' series has no table of standard values")
    return _all_values(name)


def standard_values(series: str, lo: float, hi: float) -> np.ndarray:
    """All values of an E-series (every decade) with ``lo <= value <= hi``, sorted.

    A relative slack of 1e-9 keeps a bound given as a standard value (``lo=1e-12``) in.
    """
    values = _e_values(series)
    keep = (values >= lo * (1 - 1e-9)) & (values <= hi * (1 + 1e-9))
    return values[keep].copy()


def nearest_standard(value, series: str):
    """The standard value nearest to ``value`` by ratio (log distance); a float for a scalar.

    Ratio distance is the convention for preferred numbers (ESERIES-NEAREST-CONVENTION in
    the reference notes): 1.345 -> 1.5 in E12 although 1.2 is closer linearly. A value
    exactly at a geometric midpoint goes to the lower neighbour. ``series="ideal"``
    returns the value unchanged. Arrays are snapped element by element.
    """
    v = np.asarray(value, dtype=float)
    if check_series(series) == "ideal":
        snapped = v.copy()
    else:
        table = _e_values(series)
        log_t, log_v = np.log(table), np.log(v)
        i = np.clip(np.searchsorted(log_t, log_v), 1, table.size - 1)
        upper_closer = (log_t[i] - log_v) < (log_v - log_t[i - 1])
        snapped = np.where(upper_closer, table[i], table[i - 1])
    return float(snapped) if snapped.ndim == 0 else snapped


def neighbours(value: float, series: str, n: int = 2) -> np.ndarray:
    """The ``n`` standard values at or below ``value`` and the ``n`` above it, sorted.

    "Below" includes ``value`` itself when it is a standard value. ``series="ideal"``
    gives just ``[value]``.
    """
    if check_series(series) == "ideal":
        return np.array([float(value)])
    table = _e_values(series)
    i = int(np.searchsorted(table, value * (1 + 1e-12), side="right"))
    return table[max(i - n, 0): i + n].copy()


# ---------------------------------------------------------------------------------------
# Part libraries

_COMMON_KEYS = frozenset({"min", "max", "tolerance", "tolerance_abs", "tolerance_abs_below"})
_MODEL_KEYS = {
    "inductor": frozenset({"q", "q_ref_hz", "cp_f"}),
    "capacitor": frozenset({"q", "q_ref_hz", "esr_ohm", "esl_h"}),
}
_TOP_KEYS = frozenset({"description", *KINDS})


@dataclass(frozen=True)
class KindSpec:
    """One kind of part in a library (all SI): what exists, how precise, how it behaves.

    ``tolerance`` is relative (0.05 = +-5 %); below ``tolerance_abs_below`` the absolute
    ``tolerance_abs`` (H or F) applies instead. Model fields None mean ideal behaviour;
    ``cp_f`` (inductor parallel capacitance, F) and ``esl_h`` (capacitor series
    inductance, H) set the self-resonance of each value.
    """

    kind: str
    min: float
    max: float
    tolerance: float
    tolerance_abs: float | None = None
    tolerance_abs_below: float | None = None
    q: float | None = None
    q_ref_hz: float | None = None
    cp_f: float | None = None
    esr_ohm: float | None = None
    esl_h: float | None = None

    @property
    def is_ideal(self) -> bool:
        return all(not x for x in (self.q, self.cp_f, self.esr_ohm, self.esl_h))

    def srf_hz(self, values) -> np.ndarray | None:
        """Self-resonant frequency (Hz) of each value, or None without a parasitic."""
        parasitic = self.cp_f if self.kind == "inductor" else self.esl_h
        if not parasitic:
            return None
        return 1 / (2 * np.pi * np.sqrt(np.asarray(values, dtype=float) * parasitic))

    def as_dict(self) -> dict:
        return {k: v for k, v in self.__dict__.items() if v is not None and k != "kind"}


@dataclass(frozen=True)
class PartLibrary:
    """A part library: one :class:`KindSpec` per kind, loaded from ``path``."""

    name: str
    path: str
    inductor: KindSpec
    capacitor: KindSpec
    description: str = ""

    def spec(self, kind: str) -> KindSpec:
        if kind not in KINDS:
            raise ValueError(f"kind must be one of {KINDS}, not {kind!r}")
        return self.inductor if kind == "inductor" else self.capacitor

    @property
    def ranges(self) -> dict[str, tuple[float, float]]:
        """``{kind: (min, max)}`` in H and F."""
        return {k: (self.spec(k).min, self.spec(k).max) for k in KINDS}

    @property
    def tolerances(self) -> dict[str, dict]:
        """``{kind: {"tolerance": rel, "tolerance_abs": ..., "tolerance_abs_below": ...}}``."""
        keys = ("tolerance", "tolerance_abs", "tolerance_abs_below")
        return {k: {key: getattr(self.spec(k), key) for key in keys} for k in KINDS}

    @property
    def is_ideal(self) -> bool:
        """True when every part is modelled as lossless and without self-resonance."""
        return self.inductor.is_ideal and self.capacitor.is_ideal

    def tolerance_for(self, kind: str, values) -> np.ndarray:
        """The +- deviation (H or F) of each nominal value, as the lot Monte Carlo draws it."""
        spec = self.spec(kind)
        v = np.asarray(values, dtype=float)
        dev = spec.tolerance * v
        if spec.tolerance_abs is not None and spec.tolerance_abs_below is not None:
            dev = np.where(v < spec.tolerance_abs_below, spec.tolerance_abs, dev)
        return dev

    def model_arrays(self, kind: str, values) -> dict:
        """Keyword arguments for :func:`pipeline.elements.part_impedance` for ``values``.

        ``{"q", "q_ref_hz", "esr_ohm", "srf_hz"}``, each None (effect absent), a float,
        or (``srf_hz``) an array shaped like ``values``.
        """
        spec = self.spec(kind)
        return {"q": spec.q, "q_ref_hz": spec.q_ref_hz if spec.q else None,
                "esr_ohm": spec.esr_ohm or None, "srf_hz": spec.srf_hz(values)}

    def model_for(self, kind: str, value: float) -> PartModel:
        """The :class:`PartModel` of one part of ``value`` (H or F)."""
        m = self.model_arrays(kind, value)
        srf = None if m["srf_hz"] is None else float(m["srf_hz"])
        return PartModel(q=m["q"], q_ref_hz=m["q_ref_hz"], esr_ohm=m["esr_ohm"], srf_hz=srf)

    def as_dict(self) -> dict:
        """JSON-ready description, stored with every result."""
        return {"name": self.name, "path": self.path, "description": self.description,
                **{k: self.spec(k).as_dict() for k in KINDS}}


def _number(table: dict, key: str, *, where: str, section: str, positive: bool) -> float | None:
    """A numeric key of a kind section, None when absent; ConfigError when not usable."""
    if key not in table:
        return None
    value = table[key]
    ok = isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)
    if not ok or value < 0 or (positive and value == 0):
        need = "a positive number" if positive else "a number >= 0"
        raise ConfigError(f"must be {need} (SI units), not {value!r}", where=where,
                          key=f"{section}.{key}")
    return float(value)


def _kind_spec(kind: str, table, *, where: str) -> KindSpec:
    """Validate one ``[inductor]`` / ``[capacitor]`` section."""
    if not isinstance(table, dict):
        raise ConfigError("must be a table ([inductor] / [capacitor] section)", where=where, key=kind)
    check_keys(table, _COMMON_KEYS | _MODEL_KEYS[kind], where=where, section=kind)
    for key in ("min", "max", "tolerance"):
        if key not in table:
            raise ConfigError("missing (required: min, max, tolerance)", where=where, key=f"{kind}.{key}")
    positive = {"min", "max", "q", "q_ref_hz"}
    values = {key: _number(table, key, where=where, section=kind, positive=key in positive)
              for key in table}
    _check_kind_consistency(kind, values, where=where)
    return KindSpec(kind=kind, **values)


def _check_kind_consistency(kind: str, v: dict, *, where: str) -> None:
    """Cross-key rules: min < max, tolerance < 1, q with q_ref_hz, ESR or Q, abs pairs."""
    if not v["min"] < v["max"]:
        raise ConfigError(f"must be above min ({v['min']:g})", where=where, key=f"{kind}.max")
    if not v["tolerance"] < 1:
        raise ConfigError("relative tolerance must be below 1 (0.05 means +-5 %)", where=where,
                          key=f"{kind}.tolerance")
    if (v.get("q") is None) != (v.get("q_ref_hz") is None):
        raise ConfigError("q and q_ref_hz go together", where=where, key=f"{kind}.q")
    if v.get("q") is not None and v.get("esr_ohm") is not None:
        raise ConfigError("give esr_ohm or q (with q_ref_hz), not both", where=where,
                          key=f"{kind}.esr_ohm")
    if (v.get("tolerance_abs") is None) != (v.get("tolerance_abs_below") is None):
        raise ConfigError("tolerance_abs and tolerance_abs_below go together", where=where,
                          key=f"{kind}.tolerance_abs")


def load_parts(name_or_path: str | Path) -> PartLibrary:
    """Load a part library: a path, or a name under ``configs/parts/`` (``"generic-0402"``).

    Unknown keys, missing required keys and negative or non-numeric values raise
    :class:`ConfigError` naming the file and the key.
    """
    path = resolve(name_or_path, "parts")
    where = str(path)
    data = load_toml(path)
    check_keys(data, _TOP_KEYS, where=where)
    for kind in KINDS:
        if kind not in data:
            raise ConfigError(f"missing [{kind}] section", where=where, key=kind)
    description = data.get("description", "")
    if not isinstance(description, str):
        raise ConfigError("must be a string", where=where, key="description")
    specs = {kind: _kind_spec(kind, data[kind], where=where) for kind in KINDS}
    return PartLibrary(name=path.stem, path=where, description=description, **specs)


@functools.lru_cache(maxsize=1)
def ideal_library() -> PartLibrary:
    """configs/parts/ideal.toml, read once: what ``parts=None`` means in the match core."""
    return load_parts("ideal")
