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
* :func:`worst_return_loss` is the vectorised scorer behind it (candidates x units x
  frequencies in one call), reused by the lot-level shared-network search.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.ndimage import minimum_filter
from scipy.optimize import minimize

from pipeline import metrics
from pipeline.elements import KINDS, POSITIONS, Element, part_impedance
from pipeline.errors import MatchError
from pipeline.networks import (TOPOLOGIES, Topology, delivered_fraction, element_ladder,
                               gamma_in, reflection)
from pipeline.parts import (PartLibrary, check_series, ideal_library, mantissas, nearest_standard,
                            neighbours, standard_values)
from pipeline.units import format_si

SINGLE_PARTS: tuple[Topology, ...] = tuple(Topology((p,), (k,)) for p in POSITIONS for k in KINDS)
"""The one-part arrangements: series-L, series-C, shunt-L, shunt-C."""

_REL_TOL = 1e-9          # R == z0, G == 1/z0, Z == z0 within this relative tolerance
_GRID_PER_DECADE = 8     # coarse search grid over the library's value ranges
_GRID_MAX_FREQS = 8      # band points the coarse grid is scored on (edges always included)
_SEARCH_MAX_FREQS = 16   # band points the Nelder-Mead search is scored on
_FIRST_STEP = math.log(10) / _GRID_PER_DECADE / 2   # half a grid cell, in log-value
_MAX_SEARCH_STEPS = 400  # bound on Nelder-Mead iterations (20-60 are typical)
_SNAP_WINDOW = 6         # standard values tried below and above each continuous optimum
_SNAP_MAX_FREQS = 16     # band points the standard-value grid is first scored on
_SNAP_FINALISTS = 3      # best grid points per layout scored again on every band point
_SNAP_ROUNDS = 6         # bound on re-centring the window of standard values
_FD_STEP = 1e-7          # log-value step of the finite-difference Jacobian in _polish
_POLISH_ROUNDS = 4       # bound on adding peak points to the polishing constraints
_POLISH_MARGIN = 0.1     # peaks of |Gamma| within 10 % of the largest constrain the polish
_MIN_GAIN_DB = 0.01      # a network must beat the bare load by this much to be listed


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


def _evaluate(elements: tuple[Element, ...], topology: str, series: str, freq_hz, z_load,
              center: tuple[float, complex], z0: float) -> Solution:
    """A :class:`Solution` whose figures are computed from the concrete elements.

    freq_hz, z_load: the band points; center: (f, Z) at the band centre.
    """
    f = np.append(np.asarray(freq_hz, dtype=float), center[0])
    z = np.append(np.asarray(z_load, dtype=complex), center[1])
    ladder = element_ladder(elements, f)
    rl = metrics.return_loss_db(gamma_in(ladder, z, z0) * np.ones(f.size))
    power = delivered_fraction(ladder, z, z0) * np.ones(f.size)
    return Solution(elements=elements, topology=topology, return_loss_db=float(np.min(rl[:-1])),
                    return_loss_center_db=float(rl[-1]),
                    delivered_fraction_min=float(np.min(power[:-1])), series=series)


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
# A band: the measured points, the search, the standard values

def _check_sweep(freq_hz: np.ndarray, z_load: np.ndarray, z0: float, where: str) -> None:
    if freq_hz.ndim != 1 or z_load.shape != freq_hz.shape or freq_hz.size < 2:
        raise MatchError(f"frequency and impedance arrays must be 1-D and of equal length "
                         f"({freq_hz.shape} vs {z_load.shape})", where=where or None)
    if not (np.all(np.isfinite(freq_hz)) and np.all(np.isfinite(z_load))):
        raise MatchError("NaN or infinite value in the sweep", where=where or None)
    if np.any(np.diff(freq_hz) <= 0):
        raise MatchError("frequencies are not strictly rising", where=where or None)
    if not (math.isfinite(z0) and z0 > 0):
        raise MatchError(f"reference impedance {z0!r} ohm must be positive", where=where or None)


def _interpolate_z(freq_hz, z_load, at, z0: float) -> np.ndarray:
    """Impedance at frequencies ``at``, interpolated linearly in the real and imaginary
    parts of the reflection coefficient (bounded and smooth on the Smith chart, unlike Z,
    which swings wildly near a parallel resonance)."""
    g = reflection(z_load, z0)
    g_at = np.interp(at, freq_hz, g.real) + 1j * np.interp(at, freq_hz, g.imag)
    return z0 * (1 + g_at) / (1 - g_at)


def band_points(freq_hz, z_load, band_hz, z0: float = 50.0, where: str = ""):
    """The frequencies (Hz) and load impedances (ohm) a band match is scored on.

    The measured points inside ``band_hz = (lo, hi)`` plus both band edges, interpolated
    (see :func:`_interpolate_z`) when they fall between points, so an edge counts. The
    band must lie inside the sweep and hold at least 3 measured points, and the load
    must be passive (R > 0) there; otherwise :class:`MatchError` naming ``where``.
    """
    f = np.asarray(freq_hz, dtype=float)
    z = np.asarray(z_load, dtype=complex)
    _check_sweep(f, z, z0, where)
    lo, hi = (float(b) for b in band_hz)
    place = where or None
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
    z_b[np.isin(f_b, f[inside])] = z[inside]          # measured points exactly as measured
    if np.any(z_b.real <= 0):
        raise MatchError(f"{band_text}: the load resistance is not positive at "
                         f"{np.count_nonzero(z_b.real <= 0)} points (not a passive load)", where=place)
    return f_b, z_b


# ---------------------------------------------------------------------------------------
# The band search. A "row" is one arrangement started from one seed; all rows with the
# same number of parts are scored together in one numpy evaluation (rows x candidates x
# frequencies), so a whole search is a few dozen array evaluations, not thousands of
# scalar ones (per-call overhead, not arithmetic, is what a scalar optimiser pays here).

@dataclass(frozen=True, eq=False)
class _Band:
    """What a band search scores against: band points, reference, part library."""

    freq_hz: np.ndarray          # (F,) band points, Hz
    z_load: np.ndarray           # (F,) load impedance there, ohm
    z0: float
    parts: PartLibrary
    center: tuple[float, complex]    # (Hz, ohm) at the band centre

    def subset(self, idx: np.ndarray) -> _Band:
        return _Band(self.freq_hz[idx], self.z_load[idx], self.z0, self.parts, self.center)


@dataclass(frozen=True, eq=False)
class _Rows:
    """Arrangements searched together (all with n parts): row a is ``layouts[a]``.

    Holds what the scorer needs: row masks per (part slot, kind), the slice of rows of
    each position order, and the log-value bounds (A, n) from the library ranges.
    """

    layouts: tuple[Topology, ...]
    kind_rows: dict
    order_rows: dict
    lo: np.ndarray
    hi: np.ndarray

    @classmethod
    def of(cls, layouts, parts: PartLibrary) -> _Rows:
        """Rows for ``layouts``; rows of one position order must be adjacent (a slice)."""
        layouts = tuple(layouts)
        n = len(layouts[0].positions)
        kind_rows = {(s, kind): np.array([lay.kinds[s] == kind for lay in layouts])
                     for s in range(n) for kind in KINDS}
        order_rows = {}
        for order in dict.fromkeys(lay.positions for lay in layouts):
            where = [a for a, lay in enumerate(layouts) if lay.positions == order]
            if where != list(range(where[0], where[-1] + 1)):
                raise ValueError("rows of one position order must be adjacent")
            order_rows[order] = slice(where[0], where[-1] + 1)
        bounds = np.log([[parts.ranges[kind] for kind in lay.kinds] for lay in layouts])
        return cls(layouts, kind_rows, order_rows, bounds[..., 0], bounds[..., 1])


def _rows_impedances(rows: _Rows, values, band: _Band) -> list[np.ndarray]:
    """Impedances (ohm) of every part of every row: one array (A, ..., F) per part slot.

    values : one array per part slot (source side first), each of shape (A, ...). All
             parts of one kind go through one :func:`part_impedance` call.
    """
    values = [np.asarray(v, dtype=float) for v in values]
    f = band.freq_hz
    out = [np.empty(v.shape + f.shape, dtype=complex) for v in values]
    for kind in KINDS:
        picks = [rows.kind_rows[s, kind] for s in range(len(values))]
        chunks = [v[pick] for v, pick in zip(values, picks)]
        flat = np.concatenate([c.ravel() for c in chunks])[:, np.newaxis]
        if not flat.size:
            continue
        z = part_impedance(kind, flat, f, **band.parts.model_arrays(kind, flat))
        start = 0
        for o, pick, chunk in zip(out, picks, chunks):
            o[pick] = z[start:start + chunk.size].reshape(chunk.shape + f.shape)
            start += chunk.size
    return out


def _rows_gamma(rows: _Rows, values, band: _Band) -> np.ndarray:
    """|Gamma_in| of candidate ``values`` (one (A, ...) array per part): shape (A, ..., F)."""
    z_parts = _rows_impedances(rows, values, band)
    mag = np.empty(np.broadcast_shapes(*(z.shape for z in z_parts), band.z_load.shape))
    for order, pick in rows.order_rows.items():
        ladder = list(zip(order, (z[pick] for z in z_parts)))
        mag[pick] = np.abs(gamma_in(ladder, band.z_load, band.z0))
    return mag


def _rows_cost(rows: _Rows, points: np.ndarray, band: _Band) -> np.ndarray:
    """Worst |Gamma| over the band at log-value ``points`` (A, K, n); shape (A, K)."""
    values = [np.exp(points[..., s]) for s in range(points.shape[-1])]
    return np.max(_rows_gamma(rows, values, band), axis=-1)


def _grid_worst(rows: _Rows, axes: list[np.ndarray], band: _Band) -> np.ndarray:
    """Worst |Gamma| (A, P**n) of every combination of the candidates ``axes[s]`` (A, P)
    of each part slot s, row by row (combinations in C order)."""
    n, count = len(axes), len(rows.layouts)
    grid = [axes[s].reshape((count,) + tuple(axes[s].shape[1] if t == s else 1 for t in range(n)))
            for s in range(n)]
    return np.max(_rows_gamma(rows, grid, band), axis=-1).reshape(count, -1)


def _grid_values(axes: list[np.ndarray], combos: np.ndarray) -> np.ndarray:
    """Part values (A, K, n) of the grid combinations ``combos`` (A, K) (see _grid_worst)."""
    picks = np.unravel_index(combos, tuple(axis.shape[1] for axis in axes))
    return np.stack([np.take_along_axis(axis, pick, axis=1) for axis, pick in zip(axes, picks)], axis=-1)


def _spread(n_points: int, at_most: int) -> np.ndarray:
    """Indices of at most ``at_most`` evenly spread points out of ``n_points``, ends included."""
    return np.unique(np.linspace(0, n_points - 1, min(n_points, at_most)).round().astype(int))


def _coarse_grid(rows: _Rows, band: _Band, seeds: int) -> np.ndarray:
    """Log-values (A, seeds, n): per row, the best local minima of a log grid over the
    ranges (the best point repeated where there are fewer), best first."""
    count = math.ceil(np.max(rows.hi - rows.lo) / math.log(10) * _GRID_PER_DECADE) + 1
    n = rows.lo.shape[1]
    axes = [np.geomspace(np.exp(rows.lo[:, s]), np.exp(rows.hi[:, s]), count, axis=1) for s in range(n)]
    worst = _grid_worst(rows, axes, band.subset(_spread(band.freq_hz.size, _GRID_MAX_FREQS)))
    cube = worst.reshape((-1,) + (count,) * n)
    is_min = cube == minimum_filter(cube, size=(1,) + (3,) * n, mode="nearest")
    ranked = np.argsort(np.where(is_min.reshape(worst.shape), worst, np.inf), axis=1, kind="stable")
    found = np.minimum(np.count_nonzero(is_min.reshape(worst.shape), axis=1), seeds)    # >= 1
    picks = ranked[:, :seeds]
    picks = np.where(np.arange(seeds) < found[:, None], picks, picks[:, :1])
    return np.log(_grid_values(axes, picks))


def _nelder_mead(rows: _Rows, x0, step, precision, band: _Band) -> np.ndarray:
    """Nelder-Mead on every row at once, minimising its worst |Gamma| from log-values x0 (A, n).

    The textbook method with scipy's coefficients (reflect 1, expand 2, contract 0.5,
    shrink 0.5) and its convergence test (simplex and values within ``precision``),
    run in lockstep: each iteration scores every row's four trial points and its shrink
    points in one evaluation, then applies each row's rule. Candidates are clipped to
    the library ranges. Nelder-Mead only compares values and its simplex stretches
    along the ridges that a max over frequency forms, where a fixed-stencil search
    stalls (measured: 0.03 dB short on a two-edge ridge). scipy's own Nelder-Mead, one
    row at a time from the same seeds to the same precision, finds the same optima but
    makes one scalar call per candidate, each paying numpy's per-call overhead: the
    whole band match of tests/benchmarks/bench_match.py took about 1.5 times as long
    (79 ms against 48 ms with E24 values, 54 ms against 37 ms with exact values, on a
    shared 2-core machine).
    """
    lo, hi = rows.lo[:, None, :], rows.hi[:, None, :]
    index, n = np.arange(x0.shape[0])[:, None], x0.shape[1]
    sign = np.where(x0 + step > rows.hi, -1.0, 1.0)[:, None, :]        # stay inside at a bound
    simplex = np.clip(x0[:, None, :] + step * np.vstack([np.zeros(n), np.eye(n)]) * sign, lo, hi)
    values = _rows_cost(rows, simplex, band)
    for _ in range(_MAX_SEARCH_STEPS):
        order = np.argsort(values, axis=1, kind="stable")
        simplex, values = simplex[index, order], values[index, order]
        if (np.max(np.abs(simplex[:, 1:] - simplex[:, :1])) <= precision.log_value
                and np.max(values[:, -1] - values[:, 0]) <= precision.gamma):
            break
        centroid = simplex[:, :-1].mean(axis=1)
        toward = centroid - simplex[:, -1]
        trials = centroid[:, None, :] + np.array([1.0, 2.0, 0.5, -0.5])[:, None] * toward[:, None, :]
        shrunk = simplex[:, :1] + 0.5 * (simplex[:, 1:] - simplex[:, :1])
        cand = np.clip(np.concatenate([trials, shrunk], axis=1), lo, hi)
        simplex, values = _nelder_mead_rule(simplex, values, cand, _rows_cost(rows, cand, band))
    return simplex[index[:, 0], np.argmin(values, axis=1)]


def _nelder_mead_rule(simplex, values, cand, cost):
    """One Nelder-Mead decision per row: replace the worst vertex, or shrink.

    cand/cost hold, per row, the reflected, expanded, outside- and inside-contracted
    points, then the shrink points.
    """
    f_best, f_next, f_worst = values[:, 0], values[:, -2], values[:, -1]
    fr, fe, fo, fi = cost[:, 0], cost[:, 1], cost[:, 2], cost[:, 3]
    expand = (fr < f_best) & (fe < fr)
    reflect = ((fr < f_best) & ~(fe < fr)) | ((fr >= f_best) & (fr < f_next))
    outside = (fr >= f_next) & (fr < f_worst) & (fo <= fr)
    inside = (fr >= f_worst) & (fi < f_worst)
    pick = np.select([expand, reflect, outside, inside], [1, 0, 2, 3], default=-1)
    simplex, values = simplex.copy(), values.copy()
    keep = np.flatnonzero(pick >= 0)
    simplex[keep, -1] = cand[keep, pick[keep]]
    values[keep, -1] = cost[keep, pick[keep]]
    shrink = pick < 0
    simplex[shrink, 1:] = cand[shrink, 4:]
    values[shrink, 1:] = cost[shrink, 4:]
    return simplex, values


def _closed_form_seeds(layout: Topology, center: tuple[float, complex], z0: float) -> list[np.ndarray]:
    """Log-values of the exact single-frequency solutions at the band centre with this layout."""
    f_c, z_c = center
    return [np.log([e.value for e in elements])
            for elements, _ in _closed_form_networks(z_c, f_c, z0)
            if elements and _topology_name(elements) == layout.name]


def _continuous_optima(family: _Rows, precision: _Precision, band: _Band) -> np.ndarray:
    """Each layout's best part values (A, n) over the band, within the library ranges.

    Each layout is searched (on a subset of the band points) from the best local minima
    of a coarse grid (``precision.grid_seeds``) and from each exact solution at the band
    centre, all at once; the best of its searches over the whole band wins, and is
    polished to the exact minimax when ``precision.polish``.
    """
    layouts, starts = [], []
    for layout, seeds in zip(family.layouts, _coarse_grid(family, band, precision.grid_seeds)):
        for start in list(np.unique(seeds, axis=0)) + _closed_form_seeds(layout, band.center, band.z0):
            layouts.append(layout)             # family order: position orders stay adjacent
            starts.append(start)
    rows = _Rows.of(layouts, band.parts)
    search = band.subset(_spread(band.freq_hz.size, _SEARCH_MAX_FREQS))
    x = _nelder_mead(rows, np.clip(np.array(starts), rows.lo, rows.hi), _FIRST_STEP, precision, search)
    worst = _rows_cost(rows, x[:, None, :], band)[:, 0]
    best = []
    for layout in family.layouts:
        mine = [a for a, lay in enumerate(layouts) if lay == layout]
        x_best = x[mine[int(np.argmin(worst[mine]))]]
        best.append(np.exp(_polish(layout, x_best, band) if precision.polish else x_best))
    return np.array(best)


def _worst_points(mag: np.ndarray) -> np.ndarray:
    """Band-point indices where the worst case lives: the local maxima of |Gamma| over
    frequency (band edges included) within ``_POLISH_MARGIN`` of the largest, and their
    neighbours."""
    padded = np.concatenate(([-np.inf], mag, [-np.inf]))
    peak = (mag >= padded[:-2]) & (mag >= padded[2:]) & (mag >= (1 - _POLISH_MARGIN) * mag.max())
    peaks = np.flatnonzero(peak)
    return np.unique(np.clip(np.concatenate([peaks - 1, peaks, peaks + 1]), 0, mag.size - 1))


def _epigraph_slsqp(rows: _Rows, x: np.ndarray, band: _Band) -> np.ndarray:
    """SLSQP on min t subject to |Gamma(f_i)| <= t at the band points, from log-values x.

    The constraint Jacobian is a forward difference, computed with the values in one
    evaluation.
    """
    n = x.size
    shifts = np.vstack([np.zeros(n), _FD_STEP * np.eye(n)])
    memo: dict = {}

    def mags(log_v):                        # |Gamma| (n + 1, F) at log_v and log_v + h e_j
        key = log_v.tobytes()
        if key not in memo:
            points = (log_v + shifts)[None]
            memo.clear()
            memo[key] = _rows_gamma(rows, [np.exp(points[..., s]) for s in range(n)], band)[0]
        return memo[key]

    def gap(y):                             # t - |Gamma(f_i)| >= 0
        return y[n] - mags(y[:n])[0]

    def gap_jacobian(y):
        m = mags(y[:n])
        return np.hstack([-(m[1:] - m[0]).T / _FD_STEP, np.ones((m.shape[1], 1))])

    bounds = list(zip(rows.lo[0], rows.hi[0])) + [(0.0, None)]
    result = minimize(lambda y: y[n], np.append(x, mags(x)[0].max()), jac=lambda y: np.eye(n + 1)[n],
                      method="SLSQP", bounds=bounds, options={"ftol": 1e-12, "maxiter": 100},
                      constraints=[{"type": "ineq", "fun": gap, "jac": gap_jacobian}])
    return np.clip(result.x[:n], rows.lo[0], rows.hi[0])


def _polish(layout: Topology, x: np.ndarray, band: _Band) -> np.ndarray:
    """Sharpen a search result ``x`` (log-values, (n,)) to the exact minimax over the band.

    The minimax is posed in its smooth epigraph form (:func:`_epigraph_slsqp`), which
    scipy's SLSQP follows along the ridges where the max over frequency has kinks
    (Nelder-Mead can stall on a narrow one: measured 7.891 dB where 7.896 dB was
    possible). The constraints are the points around the highest peaks of |Gamma| over
    frequency (SLSQP's cost grows fast with their number); when the result peaks
    elsewhere, the new peaks join and it is solved again.
    The result is kept only if it is better over every band point.
    """
    rows = _Rows.of([layout], band.parts)

    def mag(log_v):
        return _rows_gamma(rows, [np.exp(log_v[None, s]) for s in range(log_v.size)], band)[0]

    start_worst = mag(x).max()
    points, y = _worst_points(mag(x)), x
    for _ in range(_POLISH_ROUNDS):
        y = _epigraph_slsqp(rows, y, band.subset(points))
        now = mag(y)
        if np.argmax(now) in points:
            break
        points = np.union1d(points, _worst_points(now))
    return y if mag(y).max() < start_worst else x


def _standard_candidates(kind: str, value: float, series: str, parts: PartLibrary) -> np.ndarray:
    """The standard values tried for one part: ``_SNAP_WINDOW`` below and above ``value``
    inside the library range, padded by repeating the last one (always at least the
    in-range value nearest to ``value``)."""
    lo, hi = parts.ranges[kind]
    near = neighbours(value, series, _SNAP_WINDOW)
    near = near[(near >= lo * (1 - 1e-9)) & (near <= hi * (1 + 1e-9))]
    if not near.size:
        available = standard_values(series, lo, hi)
        if not available.size:
            unit = "H" if kind == "inductor" else "F"
            raise MatchError(f"the part library has no {series} {kind} between "
                             f"{format_si(lo, unit)} and {format_si(hi, unit)}", where=parts.path)
        near = np.array([nearest_standard(np.clip(value, available[0], available[-1]), series)])
    return np.pad(near, (0, 2 * _SNAP_WINDOW - near.size), mode="edge")


def _best_in_window(family: _Rows, centres: np.ndarray, series: str, band: _Band,
                    coarse: _Band) -> tuple[np.ndarray, np.ndarray]:
    """Per layout, the best standard values within ``_SNAP_WINDOW`` steps of ``centres`` (A, n).

    Every combination is scored on the ``coarse`` subset of the band points, and the
    ``_SNAP_FINALISTS`` best of each layout are scored again on every band point.
    Returns the values (A, n) and their worst |Gamma| over the band (A,).
    """
    axes = [np.array([_standard_candidates(lay.kinds[s], c[s], series, band.parts)
                      for lay, c in zip(family.layouts, centres)]) for s in range(centres.shape[1])]
    worst = _grid_worst(family, axes, coarse)
    cand = _grid_values(axes, np.argsort(worst, axis=1, kind="stable")[:, :_SNAP_FINALISTS])
    worst = _rows_cost(family, np.log(cand), band)
    best, rows = np.argmin(worst, axis=1), np.arange(len(family.layouts))
    return cand[rows, best], worst[rows, best]


def _best_standard(family: _Rows, values: np.ndarray, series: str, band: _Band) -> np.ndarray:
    """Per layout, the best joint choice of standard values near the optimum ``values`` (A, n).

    Near-optimal networks lie along a valley in (log L, log C), and the best standard pair
    can sit well away from the continuous optimum along it. So the window of standard
    values is re-centred on the best pair found, for the layouts where that improved the
    worst-in-band match, until none improves (``_SNAP_ROUNDS`` rounds at most).
    """
    coarse = band.subset(_spread(band.freq_hz.size, _SNAP_MAX_FREQS))
    best, score = _best_in_window(family, values, series, band, coarse)
    active = np.arange(len(family.layouts))
    for _ in range(_SNAP_ROUNDS - 1):
        rows = _Rows.of([family.layouts[a] for a in active], band.parts)
        moved, moved_score = _best_in_window(rows, best[active], series, band, coarse)
        better = moved_score < score[active]
        if not better.any():
            break
        active = active[better]
        best[active], score[active] = moved[better], moved_score[better]
    return best


@dataclass(frozen=True)
class _Precision:
    """How exactly the continuous search converges (see :func:`_precision`)."""

    log_value: float        # Nelder-Mead simplex size at convergence, in log-value
    gamma: float            # spread of |Gamma| over the simplex at convergence
    grid_seeds: int         # coarse-grid local minima each layout is searched from
    polish: bool            # finish each layout with the exact minimax (:func:`_polish`)


def _precision(series: str) -> _Precision:
    """How far to take the continuous search.

    Exact values: Nelder-Mead from three grid minima per layout to 0.1 %, then the exact
    minimax over every band point (:func:`_polish`). Standard values: the optimum only
    centres the window of standard values tried (:func:`_best_standard`), so one grid
    minimum per layout and a tenth of the series' step are enough.
    """
    if series == "ideal":
        return _Precision(log_value=1e-2, gamma=1e-3, grid_seeds=3, polish=True)
    return _Precision(log_value=math.log(10) / len(mantissas(series)) / 10, gamma=1e-3,
                      grid_seeds=1, polish=False)


def _worth_listing(found: list[Solution], bare: Solution) -> list[Solution]:
    """Solutions that beat, by ``_MIN_GAIN_DB``, the bare load and every network with fewer
    parts (a part that does not improve the match is left out)."""
    def best_simpler(s: Solution) -> float:
        return max(o.return_loss_db for o in [bare, *found] if len(o.elements) < len(s.elements))
    return [s for s in found if s.return_loss_db > best_simpler(s) + _MIN_GAIN_DB]


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
    :func:`_best_standard`).

    Listed: each arrangement whose best beats the bare load and every network with fewer
    parts by 0.01 dB; when none does, the one solution is the empty network ("no
    network needed"). Sorted by worst-in-band return loss, then fewer parts, then more
    power delivered.
    """
    series = check_series(series)
    f_b, z_b = band_points(freq_hz, z_load, band_hz, z0, where)
    parts = parts or ideal_library()
    f_c = 0.5 * (f_b[0] + f_b[-1])
    z_c = complex(_interpolate_z(np.asarray(freq_hz, float), np.asarray(z_load, complex), f_c, z0))
    band = _Band(f_b, z_b, float(z0), parts, (f_c, z_c))
    found = []
    for family in (_Rows.of(TOPOLOGIES, parts), _Rows.of(SINGLE_PARTS, parts)):
        optima = _continuous_optima(family, _precision(series), band)
        if series != "ideal":
            optima = _best_standard(family, optima, series, band)
        for layout, values in zip(family.layouts, optima):
            elements = tuple(Element(p, k, float(v), parts.model_for(k, float(v)))
                             for p, k, v in zip(layout.positions, layout.kinds, values))
            found.append(_evaluate(elements, layout.name, series, f_b, z_b, band.center, z0))
    bare = _evaluate((), "none", series, f_b, z_b, band.center, z0)
    listed = _worth_listing(found, bare)
    listed.sort(key=lambda s: (-s.return_loss_db, len(s.elements), -s.delivered_fraction_min, s.topology))
    return listed or [bare]
