"""Two-element L-network matching: closed form at one frequency, optimised over a band.

Conventions (../shared/interfaces.md): elements run from the SOURCE port (analyzer /
radio, reference impedance ``z0``) toward the load; return loss is a positive number of
dB, ``RL = -20 log10|Gamma_in|``; values are SI (H, F).

* :func:`match_at` solves the L-network exactly at one frequency with Pozar's design
  equations (Microwave Engineering 4th ed., Sec. 5.1, eqs. 5.3 and 5.6): up to four
  solutions, ideal parts.
* :func:`match_band` maximises the *worst* return loss over a band for every
  arrangement (the eight two-element :data:`pipeline.networks.TOPOLOGIES`, the four
  single parts), with the part models of a :class:`~pipeline.parts.PartLibrary`, and then
  picks the best combination of standard (E-series) values around each optimum.
* :func:`match_band_many` does the same for many units measured on one frequency grid
  (a production lot), all searched in the same array evaluations: the per-unit answer
  is unchanged, the per-unit cost is a small fraction.
  The numerical band search itself lives in :mod:`pipeline.band_search`.
* :func:`worst_return_loss` is a vectorised scorer (candidates x units x frequencies in
  one call), used by the lot-level shared-network search.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.interpolate import make_interp_spline

from pipeline import metrics
from pipeline.band_search import ladder_figures, search_chunk
from pipeline.elements import KINDS, POSITIONS, Element, part_impedance
from pipeline.errors import MatchError
from pipeline.networks import TOPOLOGIES, Topology, element_ladder, gamma_in, reflection
from pipeline.parts import PartLibrary, check_series, ideal_library
from pipeline.units import format_si

SINGLE_PARTS: tuple[Topology, ...] = tuple(Topology((p,), (k,)) for p in POSITIONS for k in KINDS)
"""The one-part arrangements: series-L, series-C, shunt-L, shunt-C."""

_REL_TOL = 1e-9          # R == z0, G == 1/z0, Z == z0 within this relative tolerance
_UNITS_PER_CHUNK = 64    # units searched together (bounds the memory: a few MB per array)


@dataclass(frozen=True)
class Solution:
    """One matching network and how well it does.

    elements               : parts from the source port toward the load (empty: no network)
    topology               : arrangement name, e.g. ``'shunt-C, series-L'``, ``'series-L'``, ``'none'``
    return_loss_db         : worst return loss over the band, with the part models in force
    return_loss_center_db  : return loss at the band centre (at f for a single frequency)
    delivered_fraction_min : smallest fraction of the available power reaching the load
                             over the band (``1 - |Gamma|**2`` for lossless parts)
    series                 : ``'ideal'`` (exact values) or the E-series the values come from
    """

    elements: tuple[Element, ...]
    topology: str
    return_loss_db: float
    return_loss_center_db: float
    delivered_fraction_min: float
    series: str

    @property
    def is_lossy(self) -> bool:
        """True when some element carries a non-ideal model (Q, ESR, self-resonance)."""
        return any(not e.model.is_ideal for e in self.elements)

    def as_dict(self) -> dict:
        """The interfaces.md solution shape, plus topology, centre RL and series.

        ``delivered_fraction_min`` is included when lossy part models were in force.
        """
        d = {"elements": [e.as_dict() for e in self.elements],
             "return_loss_db": self.return_loss_db,
             "topology": self.topology,
             "return_loss_center_db": self.return_loss_center_db,
             "series": self.series}
        if self.is_lossy:
            d["delivered_fraction_min"] = self.delivered_fraction_min
        return d


# ---------------------------------------------------------------------------------------
# Scoring: Gamma_in of candidate networks, vectorised over candidates, units, frequencies

def _layout_gamma(layout: Topology, values, freq_hz, z_load, z0: float,
                  parts: PartLibrary | None) -> np.ndarray:
    """Gamma_in for ``layout`` with candidate ``values`` (one array per part).

    Each value array gets a trailing frequency axis, so values of shape S and a load of
    shape (..., F) give Gamma of shape broadcast(S, ...) + (F,).
    """
    parts = parts or ideal_library()
    f = np.asarray(freq_hz, dtype=float)
    ladder = []
    for position, kind, value in zip(layout.positions, layout.kinds, values):
        v = np.asarray(value, dtype=float)[..., np.newaxis]
        ladder.append((position, part_impedance(kind, v, f, **parts.model_arrays(kind, v))))
    return gamma_in(ladder, np.asarray(z_load), z0)


def worst_return_loss(topology: Topology, v1: np.ndarray, v2: np.ndarray, freq_hz: np.ndarray,
                      z_load: np.ndarray, z0: float, parts: PartLibrary | None) -> np.ndarray:
    """Worst (smallest) return loss in dB over ``freq_hz`` for candidate part values.

    topology : a two-part arrangement; ``v1`` is the value (H or F) of its source-side
               part, ``v2`` of its load-side part.
    v1, v2   : candidate values, any shapes that broadcast with each other and with
               ``z_load.shape[:-1]``: e.g. v1 (K1, 1) and v2 (1, K2) for a grid.
    freq_hz  : (F,) frequencies, Hz.
    z_load   : (..., F) load impedance (ohm) at those frequencies: (F,) for one load,
               (U, 1, 1, F) for U units against a (K1, K2) grid.
    parts    : part library whose models are in force (None: ideal parts).

    Returns an array of shape broadcast(v1, v2, z_load.shape[:-1]), e.g. (U, K1, K2).
    """
    gamma = _layout_gamma(topology, (v1, v2), freq_hz, z_load, z0, parts)
    return metrics.return_loss_db(np.max(np.abs(gamma), axis=-1))


def predicted_gamma(elements, freq_hz, z_load, z0: float) -> np.ndarray:
    """Gamma_in over ``freq_hz`` for concrete elements (their own models) in front of ``z_load``."""
    f = np.asarray(freq_hz, dtype=float)
    return np.asarray(gamma_in(element_ladder(tuple(elements), f), np.asarray(z_load), z0)
                      * np.ones_like(f))


def predicted_gamma_many(networks, freq_hz, z_units, z0: float) -> np.ndarray:
    """:func:`predicted_gamma` of U networks in front of U loads on one grid, (U, F).

    networks : U sequences of elements (each with its own model), source side first.
    z_units  : (U, F) the loads (ohm) at ``freq_hz`` (F,).
    The networks of one arrangement (positions, kinds, model terms present) go through
    :func:`~pipeline.elements.part_impedance` together, their values and models as arrays:
    the same numbers as one network at a time.
    """
    f = np.asarray(freq_hz, dtype=float)
    z = np.asarray(z_units, dtype=complex)
    model_keys = ("q", "q_ref_hz", "esr_ohm", "srf_hz")
    groups: dict = {}
    for u, elements in enumerate(networks):
        key = tuple((e.position, e.kind, tuple(getattr(e.model, k) is None for k in model_keys))
                    for e in elements)
        groups.setdefault(key, []).append(u)
    out = np.empty(z.shape, dtype=complex)
    for key, units in groups.items():
        ladder = []
        for slot, (position, kind, absent) in enumerate(key):
            parts = [networks[u][slot] for u in units]
            models = {k: None if gone else np.array([[getattr(p.model, k)] for p in parts])
                      for k, gone in zip(model_keys, absent)}
            ladder.append((position, part_impedance(kind, np.array([[p.value] for p in parts]), f, **models)))
        out[units] = gamma_in(ladder, z[units], z0)
    return out


def _evaluate(elements: tuple[Element, ...], topology: str, series: str, freq_hz, z_load,
              center: tuple[float, complex], z0: float) -> Solution:
    """A :class:`Solution` whose figures are computed from the concrete elements.

    freq_hz, z_load: the band points; center: (f, Z) at the band centre.
    """
    f = np.append(np.asarray(freq_hz, dtype=float), center[0])
    z = np.append(np.asarray(z_load, dtype=complex), center[1])
    worst, at_center, power = ladder_figures(element_ladder(elements, f), z, z0)
    return Solution(elements=elements, topology=topology, return_loss_db=float(worst),
                    return_loss_center_db=float(at_center), delivered_fraction_min=float(power),
                    series=series)


# ---------------------------------------------------------------------------------------
# One frequency: closed form

def _check_point(z_load: complex, freq_hz: float, z0: float) -> None:
    if not (math.isfinite(freq_hz) and freq_hz > 0):
        raise MatchError(f"frequency {freq_hz!r} Hz must be positive")
    if not (math.isfinite(z0) and z0 > 0):
        raise MatchError(f"reference impedance {z0!r} ohm must be positive")
    if not (math.isfinite(z_load.real) and math.isfinite(z_load.imag)):
        raise MatchError(f"load impedance {z_load!r} is not finite")
    if not z_load.real > 0:
        raise MatchError(f"load resistance {z_load.real:g} ohm at {format_si(freq_hz, 'Hz')} "
                         "is not positive: a lossless network cannot match it")


def _pozar_shunt_at_load(r: float, x: float, z0: float) -> list[tuple[float, float]]:
    """(X_series, B_shunt) pairs, shunt part across the load (Pozar eqs. 5.3a/b).

    Exists when R**2 + X**2 > z0 R (always for R > z0).
    """
    mag2 = r * r + x * x
    disc = mag2 - z0 * r
    if disc <= 0:
        return []
    t = math.sqrt(r / z0) * math.sqrt(disc)
    pairs = []
    for b in ((x + t) / mag2, (x - t) / mag2):
        pairs.append((1 / b + x * z0 / r - z0 / (b * r), b))
    return pairs


def _pozar_series_at_load(r: float, x: float, z0: float) -> list[tuple[float, float]]:
    """(X_series, B_shunt) pairs, series part at the load (Pozar eqs. 5.6a/b). Needs R < z0."""
    if r >= z0:
        return []
    xs, bs = math.sqrt(r * (z0 - r)), math.sqrt((z0 - r) / r) / z0
    return [(xs - x, bs), (-xs - x, -bs)]


def _series_part(reactance: float, w: float) -> Element:
    """The series part of reactance X (ohm): X > 0 an inductor X/w, X < 0 a capacitor -1/(wX)."""
    if reactance > 0:
        return Element("series", "inductor", reactance / w)
    return Element("series", "capacitor", -1 / (w * reactance))


def _shunt_part(susceptance: float, w: float) -> Element:
    """The shunt part of susceptance B (S): B > 0 a capacitor B/w, B < 0 an inductor -1/(wB)."""
    if susceptance > 0:
        return Element("shunt", "capacitor", susceptance / w)
    return Element("shunt", "inductor", -1 / (w * susceptance))


def _closed_form_networks(z_load: complex, freq_hz: float,
                          z0: float) -> list[tuple[tuple[Element, ...], float]]:
    """Every exact network at one frequency, with its normalised |x| + |b| (for sorting)."""
    r, x, w = z_load.real, z_load.imag, 2 * math.pi * freq_hz
    if abs(z_load - z0) <= _REL_TOL * z0:
        return [((), 0.0)]
    if abs(r - z0) <= _REL_TOL * z0:                      # only the reactance to cancel
        return [((_series_part(-x, w),), abs(x) / z0)]
    g, b_load = r / abs(z_load) ** 2, -x / abs(z_load) ** 2
    if abs(g * z0 - 1) <= _REL_TOL:                      # only the susceptance to cancel
        return [((_shunt_part(-b_load, w),), abs(b_load) * z0)]
    networks = []
    for xs, bs in _pozar_shunt_at_load(r, x, z0):         # series part on the source side
        networks.append(((_series_part(xs, w), _shunt_part(bs, w)), abs(xs) / z0 + abs(bs) * z0))
    for xs, bs in _pozar_series_at_load(r, x, z0):        # shunt part on the source side
        networks.append(((_shunt_part(bs, w), _series_part(xs, w)), abs(xs) / z0 + abs(bs) * z0))
    return networks


def _lowpass_parts(elements: tuple[Element, ...]) -> int:
    """How many parts are in low-pass position (series inductor, shunt capacitor)."""
    return sum((e.position == "series") == (e.kind == "inductor") for e in elements)


def _topology_name(elements: tuple[Element, ...]) -> str:
    if not elements:
        return "none"
    return Topology(tuple(e.position for e in elements), tuple(e.kind for e in elements)).name


def match_at(z_load: complex, freq_hz: float, z0: float = 50.0) -> list[Solution]:
    """Every exact L-network matching ``z_load`` (ohm) to ``z0`` at ``freq_hz``, ideal parts.

    Pozar's two forms: shunt part across the load with the series part toward the source
    (exists when R**2 + X**2 > z0 R), and series part at the load with the shunt part
    toward the source (exists when R < z0); each has two sign solutions, so up to four.
    Special cases: a matched load gives one solution with no elements; R == z0 gives
    only the series part that cancels X; G == 1/z0 only the shunt part that cancels B.

    Order (all solutions are exact): fewest parts first; then smallest total normalised
    reactance |X|/z0 + |B| z0 (less stored energy: usually the wider band and the
    smaller loss sensitivity); then low-pass (series L, shunt C) before high-pass.
    Raises :class:`MatchError` for R <= 0 or a non-positive frequency or z0.
    """
    z_load, freq_hz, z0 = complex(z_load), float(freq_hz), float(z0)
    _check_point(z_load, freq_hz, z0)
    networks = _closed_form_networks(z_load, freq_hz, z0)
    networks.sort(key=lambda n: (len(n[0]), round(n[1], 9), -_lowpass_parts(n[0]), _topology_name(n[0])))
    center = (freq_hz, z_load)
    return [_evaluate(elements, _topology_name(elements), "ideal", [freq_hz], [z_load], center, z0)
            for elements, _ in networks]


# ---------------------------------------------------------------------------------------
# A band: the measured points

def _places(where, count: int) -> list[str]:
    """One source name per unit: ``where`` is one name for all, or one per unit."""
    if isinstance(where, str):
        return [where] * count
    places = [str(w) for w in where] or [""] * count
    if len(places) != count:
        raise ValueError(f"where names {len(places)} sources for {count} units")
    return places


def _check_sweeps(freq_hz: np.ndarray, z_units: np.ndarray, z0: float, places: list[str]) -> None:
    """The shared grid and every unit's impedances are usable; else MatchError naming the unit."""
    first = (places[0] if places else "") or None
    if (freq_hz.ndim != 1 or z_units.ndim != 2 or z_units.shape[1:] != freq_hz.shape
            or freq_hz.size < 2):
        raise MatchError(f"frequency and impedance arrays must be 1-D and of equal length "
                         f"({freq_hz.shape} vs {z_units.shape[1:]})", where=first)
    not_finite = ~np.all(np.isfinite(z_units), axis=1)
    if not np.all(np.isfinite(freq_hz)) or not_finite.any():
        unit = int(np.argmax(not_finite)) if np.all(np.isfinite(freq_hz)) else 0
        raise MatchError("NaN or infinite value in the sweep", where=places[unit] or None)
    if np.any(np.diff(freq_hz) <= 0):
        raise MatchError("frequencies are not strictly rising", where=first)
    if not (math.isfinite(z0) and z0 > 0):
        raise MatchError(f"reference impedance {z0!r} ohm must be positive", where=first)


def _interpolate_z(freq_hz, z_load, at, z0: float) -> np.ndarray:
    """Impedance at frequencies ``at``, interpolated linearly in the real and imaginary
    parts of the reflection coefficient (bounded and smooth on the Smith chart, unlike Z,
    which swings wildly near a parallel resonance). ``z_load`` is (..., F)."""
    g_at = make_interp_spline(freq_hz, reflection(z_load, z0), k=1, axis=-1)(at)
    return z0 * (1 + g_at) / (1 - g_at)


def _band_points_many(freq_hz, z_units, band_hz, z0: float, places: list[str]):
    """:func:`band_points` for U units on one grid: (F_b,) frequencies, (U, F_b) impedances."""
    f = np.asarray(freq_hz, dtype=float)
    z = np.asarray(z_units, dtype=complex)
    _check_sweeps(f, z, z0, places)
    lo, hi = (float(b) for b in band_hz)
    place = places[0] or None
    band_text = f"band {format_si(lo, 'Hz')}:{format_si(hi, 'Hz')}"
    if not lo < hi:
        raise MatchError(f"{band_text}: the first frequency must be below the second", where=place)
    slack = 1e-9 * f[-1]
    if lo < f[0] - slack or hi > f[-1] + slack:
        raise MatchError(f"{band_text} is not inside the sweep "
                         f"{format_si(f[0], 'Hz')}..{format_si(f[-1], 'Hz')}", where=place)
    inside = (f >= lo) & (f <= hi)
    if np.count_nonzero(inside) < 3:
        raise MatchError(f"{band_text} holds {np.count_nonzero(inside)} measured points; "
                         "at least 3 are needed", where=place)
    f_b = np.unique(np.concatenate(([lo], f[inside], [hi])))
    z_b = _interpolate_z(f, z, f_b, z0)
    z_b[:, np.isin(f_b, f[inside])] = z[:, inside]          # measured points exactly as measured
    not_passive = np.count_nonzero(z_b.real <= 0, axis=1)
    if not_passive.any():
        unit = int(np.argmax(not_passive > 0))
        raise MatchError(f"{band_text}: the load resistance is not positive at "
                         f"{not_passive[unit]} points (not a passive load)", where=places[unit] or None)
    return f_b, z_b


def band_points(freq_hz, z_load, band_hz, z0: float = 50.0, where: str = ""):
    """The frequencies (Hz) and load impedances (ohm) a band match is scored on.

    The measured points inside ``band_hz = (lo, hi)`` plus both band edges, interpolated
    (see :func:`_interpolate_z`) when they fall between points, so an edge counts. The
    band must lie inside the sweep and hold at least 3 measured points, and the load
    must be passive (R > 0) there; otherwise :class:`MatchError` naming ``where``.
    """
    f_b, z_b = _band_points_many(freq_hz, np.asarray(z_load, dtype=complex)[np.newaxis], band_hz,
                                 z0, [where])
    return f_b, z_b[0]


# ---------------------------------------------------------------------------------------
# A band: the search (pipeline.band_search), seeded by the closed form at the band centre

def _center_starts(center_z: np.ndarray, center_hz: float, z0: float) -> list[tuple[int, int, str, np.ndarray]]:
    """The exact single-frequency solutions at the band centre of each unit, as search
    starts: (unit, rank, arrangement name, log-values), from :func:`_closed_form_networks`."""
    return [(u, i, _topology_name(elements), np.log([e.value for e in elements]))
            for u, z in enumerate(center_z)
            for i, (elements, _) in enumerate(_closed_form_networks(complex(z), center_hz, z0))
            if elements]


def match_band_many(freq_hz, z_units, band_hz, z0: float = 50.0, series: str = "E24",
                    parts: PartLibrary | None = None, where=()) -> list[list[Solution]]:
    """:func:`match_band` for U units measured on one frequency grid, searched together.

    freq_hz : (F,) the shared sweep frequencies, Hz, rising.
    z_units : (U, F) each unit's load impedance there, ohm.
    where   : one source name per unit for error messages (or one for all).

    Returns one solution list per unit, the same as :func:`match_band` gives for that
    unit alone (it is this function with U = 1): the searches of all units run as one
    array evaluation per step, each search stopping on its own convergence test, so
    nothing a unit gets depends on the units beside it. Units are searched
    ``_UNITS_PER_CHUNK`` at a time to bound the memory. A unit whose band points are
    unusable (see :func:`band_points`) raises :class:`MatchError` naming its source.
    """
    series = check_series(series)
    parts = parts or ideal_library()
    f = np.asarray(freq_hz, dtype=float)
    z = np.asarray(z_units, dtype=complex)
    places = _places(where, z.shape[0] if z.ndim else 1)
    if z.ndim == 2 and not z.shape[0]:
        _check_sweeps(f, z, z0, places)
        return []
    f_b, z_b = _band_points_many(f, z, band_hz, z0, places)
    center_hz = 0.5 * (f_b[0] + f_b[-1])
    center_z = _interpolate_z(f, z, center_hz, z0)
    out = []
    for start in range(0, z.shape[0], _UNITS_PER_CHUNK):
        chunk = slice(start, start + _UNITS_PER_CHUNK)
        out.extend(search_chunk(f_b, z_b[chunk], center_z[chunk], z0, series, parts,
                                (TOPOLOGIES, SINGLE_PARTS),
                                _center_starts(center_z[chunk], center_hz, float(z0)), Solution))
    return out


def match_band(freq_hz, z_load, band_hz, z0: float = 50.0, series: str = "E24",
               parts: PartLibrary | None = None, where: str = "") -> list[Solution]:
    """Networks maximising the worst return loss over ``band_hz``, best first.

    freq_hz, z_load : the measured sweep (Hz, ohm), 1-D, rising frequencies.
    band_hz         : (lo, hi) in Hz, inside the sweep, with >= 3 measured points.
    series          : ``"ideal"`` for exact values, or an E-series (``"E24"``...) to
                      pick the best joint choice of standard values around each optimum.
    parts           : library giving the value ranges and the part models (None: the
                      ideal library, configs/parts/ideal.toml).
    where           : names the source in error messages (e.g. the file path).

    Scored on the measured points in the band plus both edges (see :func:`band_points`).
    Every arrangement (8 two-part, 4 one-part) is optimised within the library ranges: a
    coarse log grid and the exact solutions at the band centre seed a vectorised
    minimax search on log-values; with an E-series, the combinations of the six
    standard values below and the six above each optimal value are tried (those in
    range), re-centred on the best pair until it is the best of its own window (see
    :func:`pipeline.band_search._best_standard`).

    Listed: each arrangement whose best beats the bare load and every network with fewer
    parts by 0.01 dB; when none does, the one solution is the empty network ("no
    network needed"). Sorted by worst-in-band return loss, then fewer parts, then more
    power delivered. The one-unit case of :func:`match_band_many`.
    """
    z_units = np.asarray(z_load, dtype=complex)[np.newaxis]
    return match_band_many(freq_hz, z_units, band_hz, z0, series, parts, [where])[0]
