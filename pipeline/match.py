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
_GRID_MAX_FREQS = 16     # band points the coarse grid is scored on (edges always included)
_SEARCH_MAX_FREQS = 16   # band points the minimax search starts from (it adds the worst ones)
_FIRST_STEP = math.log(10) / _GRID_PER_DECADE / 2   # half a grid cell, in log-value
_RESTART_STEP = 0.01     # log-value step after adding points to the search
_MAX_SEARCH_STEPS = 400  # bound on Nelder-Mead iterations
_MAX_EXCHANGES = 6       # bound on adding worst points to the search subset
_SNAP_NEIGHBOURS = 2     # standard values tried below and above each continuous optimum
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


def _closed_form_networks(z_load: complex, freq_hz: float, z0: float) -> list[tuple[tuple[Element, ...], float]]:
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

def _rows_impedances(layouts, values, freq_hz, parts: PartLibrary) -> list[np.ndarray]:
    """Impedances (ohm) of every part of every row: one array (A, ..., F) per part.

    values : one array per part (source side first), each of shape (A, ...); row a is
             arranged as layouts[a]. All parts of one kind go through one call.
    """
    values = [np.asarray(v, dtype=float) for v in values]
    out = [np.empty(v.shape + freq_hz.shape, dtype=complex) for v in values]
    for kind in KINDS:
        picks = [np.array([lay.kinds[s] == kind for lay in layouts]) for s in range(len(values))]
        chunks = [v[rows] for v, rows in zip(values, picks)]
        flat = np.concatenate([c.ravel() for c in chunks])[:, np.newaxis]
        if not flat.size:
            continue
        z = part_impedance(kind, flat, freq_hz, **parts.model_arrays(kind, flat))
        start = 0
        for o, rows, chunk in zip(out, picks, chunks):
            o[rows] = z[start:start + chunk.size].reshape(chunk.shape + freq_hz.shape)
            start += chunk.size
    return out


def _rows_gamma(layouts, values, freq_hz, z_load, z0, parts) -> np.ndarray:
    """|Gamma_in| for candidate values, row a arranged as layouts[a] (same part count).

    values : one array per part (source side first), each of shape (A, ...).
    Returns |Gamma_in| of shape (A, ..., F).
    """
    z_parts = _rows_impedances(layouts, values, freq_hz, parts)
    mag = np.empty(np.broadcast_shapes(*(z.shape for z in z_parts), np.shape(z_load)))
    for order in {lay.positions for lay in layouts}:
        rows = np.array([lay.positions == order for lay in layouts])
        mag[rows] = np.abs(gamma_in(list(zip(order, (z[rows] for z in z_parts))), z_load, z0))
    return mag


def _spread(n_points: int, at_most: int) -> np.ndarray:
    """Indices of at most ``at_most`` evenly spread points out of ``n_points``, ends included."""
    return np.unique(np.linspace(0, n_points - 1, min(n_points, at_most)).round().astype(int))


def _row_bounds(layouts, parts: PartLibrary) -> tuple[np.ndarray, np.ndarray]:
    """Log-value bounds (A, n) from the library ranges of each row's parts."""
    b = np.log([[parts.ranges[kind] for kind in lay.kinds] for lay in layouts])
    return b[..., 0], b[..., 1]


def _coarse_grid(layouts, freq_hz, z_load, z0, parts) -> np.ndarray:
    """Log-values (A, n) of the best point of a log grid over the ranges, per layout."""
    lo, hi = _row_bounds(layouts, parts)
    count = math.ceil(np.max(hi - lo) / math.log(10) * _GRID_PER_DECADE) + 1
    n, rows = lo.shape[1], np.arange(len(layouts))
    axes = [np.linspace(lo[:, s], hi[:, s], count, axis=1) for s in range(n)]          # (A, P)
    grid = [np.exp(axes[s]).reshape((-1,) + tuple(count if t == s else 1 for t in range(n)))
            for s in range(n)]
    idx = _spread(freq_hz.size, _GRID_MAX_FREQS)
    worst = np.max(_rows_gamma(layouts, grid, freq_hz[idx], z_load[idx], z0, parts), axis=-1)
    best = np.unravel_index(worst.reshape(len(layouts), -1).argmin(axis=1), worst.shape[1:])
    return np.stack([axes[s][rows, best[s]] for s in range(n)], axis=1)


def _rows_cost(layouts, points, freq_hz, z_load, z0, parts) -> np.ndarray:
    """Worst |Gamma| over ``freq_hz`` at log-value ``points`` (A, K, n); shape (A, K)."""
    values = [np.exp(points[..., s]) for s in range(points.shape[-1])]
    return np.max(_rows_gamma(layouts, values, freq_hz, z_load, z0, parts), axis=-1)


def _nelder_mead(layouts, x0, step, precision, freq_hz, z_load, z0, parts) -> np.ndarray:
    """Nelder-Mead on every row at once, minimising its worst |Gamma| from log-values x0 (A, n).

    The textbook method with scipy's coefficients (reflect 1, expand 2, contract 0.5,
    shrink 0.5) and its convergence test (simplex and values within ``precision``),
    run in lockstep: each iteration scores every row's four trial
    points and its shrink points in one evaluation, then applies each row's rule.
    Candidates are clipped to the library ranges. Nelder-Mead only compares values and
    its simplex stretches along the ridges that a max over frequency forms, where a
    fixed-stencil search stalls (measured: 0.03 dB short on a two-edge ridge). scipy's
    own Nelder-Mead gave the same optima but cost 190 ms per band match against 35 ms
    here: one scalar call per candidate, each paying numpy's per-call overhead.
    """
    lo, hi = _row_bounds(layouts, parts)
    rows, n = np.arange(x0.shape[0]), x0.shape[1]
    sign = np.where(x0 + step > hi, -1.0, 1.0)                        # stay inside at a bound
    simplex = x0[:, None, :] + step * np.vstack([np.zeros(n), np.eye(n)]) * sign[:, None, :]
    simplex = np.clip(simplex, lo[:, None, :], hi[:, None, :])
    values = _rows_cost(layouts, simplex, freq_hz, z_load, z0, parts)
    for _ in range(_MAX_SEARCH_STEPS):
        order = np.argsort(values, axis=1, kind="stable")
        simplex, values = simplex[rows[:, None], order], values[rows[:, None], order]
        if (np.max(np.abs(simplex[:, 1:] - simplex[:, :1])) <= precision.log_value
                and np.max(values[:, -1] - values[:, 0]) <= precision.gamma):
            break
        centroid = simplex[:, :-1].mean(axis=1)
        toward = centroid - simplex[:, -1]
        trials = centroid[:, None, :] + np.array([1.0, 2.0, 0.5, -0.5])[:, None] * toward[:, None, :]
        shrunk = simplex[:, :1] + 0.5 * (simplex[:, 1:] - simplex[:, :1])
        cand = np.clip(np.concatenate([trials, shrunk], axis=1), lo[:, None, :], hi[:, None, :])
        cost = _rows_cost(layouts, cand, freq_hz, z_load, z0, parts)
        simplex, values = _nelder_mead_rule(simplex, values, cand, cost)
    return simplex[rows, np.argmin(values, axis=1)]


def _nelder_mead_rule(simplex, values, cand, cost):
    """One Nelder-Mead decision per row: replace the worst vertex, or shrink."""
    f_best, f_next, f_worst = values[:, 0], values[:, -2], values[:, -1]
    fr, fe, fo, fi = cost[:, 0], cost[:, 1], cost[:, 2], cost[:, 3]
    expand = (fr < f_best) & (fe < fr)
    reflect = ((fr < f_best) & ~(fe < fr)) | ((fr >= f_best) & (fr < f_next))
    outside = (fr >= f_next) & (fr < f_worst) & (fo <= fr)
    inside = (fr >= f_worst) & (fi < f_worst)
    pick = np.select([expand, reflect, outside, inside], [1, 0, 2, 3], default=-1)
    rows = np.arange(simplex.shape[0])
    simplex, values = simplex.copy(), values.copy()
    keep = pick >= 0
    simplex[rows[keep], -1] = cand[rows[keep], pick[keep]]
    values[rows[keep], -1] = cost[rows[keep], pick[keep]]
    shrink = ~keep
    simplex[shrink, 1:] = cand[shrink, 4:]
    values[shrink, 1:] = cost[shrink, 4:]
    return simplex, values


def _minimax(layouts, x, precision, freq_hz, z_load, z0, parts) -> np.ndarray:
    """Refine log-values ``x`` (A, n) toward the minimax of |Gamma| over the band points.

    The search runs on a subset of the points; then (``precision.exchanges`` times at
    most) each row's worst point over the whole band joins the subset and the search
    resumes, an exchange as in minimax fitting, until every row's worst point is
    already in the subset: then the subset's optimum is the whole band's.
    """
    subset = set(_spread(freq_hz.size, _SEARCH_MAX_FREQS).tolist())
    step = _FIRST_STEP
    for _ in range(precision.exchanges + 1):
        idx = np.array(sorted(subset))
        x = _nelder_mead(layouts, x, step, precision, freq_hz[idx], z_load[idx], z0, parts)
        if precision.exchanges == 0:
            break
        values = [np.exp(x[:, s]) for s in range(x.shape[1])]
        worst_at = np.argmax(_rows_gamma(layouts, values, freq_hz, z_load, z0, parts), axis=-1)
        if subset.issuperset(worst_at.tolist()):
            break
        subset.update(worst_at.tolist())
        step = _RESTART_STEP
    return x


def _closed_form_seeds(layout: Topology, center: tuple[float, complex], z0: float) -> list[np.ndarray]:
    """Log-values of the exact single-frequency solutions at the band centre with this layout."""
    f_c, z_c = center
    return [np.log([e.value for e in elements])
            for elements, _ in _closed_form_networks(z_c, f_c, z0)
            if elements and _topology_name(elements) == layout.name]


def _continuous_optima(layouts, precision, freq_hz, z_load, center, z0, parts) -> dict:
    """``{layout: values}``: each layout's best part values (H/F) over the band, in range.

    Each layout is searched from the best point of a coarse grid and from each exact
    solution at the band centre; the best of its rows wins.
    """
    grid_best = _coarse_grid(layouts, freq_hz, z_load, z0, parts)
    rows, starts = [], []
    for layout, seed in zip(layouts, grid_best):
        for start in [seed] + _closed_form_seeds(layout, center, z0):
            rows.append(layout)
            starts.append(start)
    lo, hi = _row_bounds(rows, parts)
    x = _minimax(rows, np.clip(np.array(starts), lo, hi), precision, freq_hz, z_load, z0, parts)
    values = [np.exp(x[:, s]) for s in range(x.shape[1])]
    worst = np.max(_rows_gamma(rows, values, freq_hz, z_load, z0, parts), axis=-1)
    best = {}
    for a in np.argsort(worst, kind="stable")[::-1]:       # best row last, so it stays
        best[rows[a]] = np.exp(x[a])
    return best


def _standard_candidates(kind: str, value: float, series: str, parts: PartLibrary) -> np.ndarray:
    """Standard values around ``value`` inside the library range (at least the nearest one)."""
    lo, hi = parts.ranges[kind]
    near = neighbours(value, series, _SNAP_NEIGHBOURS)
    near = near[(near >= lo * (1 - 1e-9)) & (near <= hi * (1 + 1e-9))]
    if near.size:
        return near
    available = standard_values(series, lo, hi)
    if not available.size:
        unit = "H" if kind == "inductor" else "F"
        raise MatchError(f"the part library has no {series} {kind} between "
                         f"{format_si(lo, unit)} and {format_si(hi, unit)}", where=parts.path)
    return np.array([nearest_standard(np.clip(value, available[0], available[-1]), series)])


def _best_standard(layout, values, series, freq_hz, z_load, z0, parts) -> np.ndarray:
    """The best joint choice of standard values near the continuous optimum ``values``."""
    axes = [_standard_candidates(kind, v, series, parts) for kind, v in zip(layout.kinds, values)]
    gamma = _layout_gamma(layout, np.ix_(*axes), freq_hz, z_load, z0, parts)
    worst = np.max(np.abs(gamma), axis=-1)
    best = np.unravel_index(np.argmin(worst), worst.shape)
    return np.array([axis[i] for axis, i in zip(axes, best)])


@dataclass(frozen=True)
class _Precision:
    """How exactly the continuous search converges (see :func:`_precision`)."""

    log_value: float        # simplex size, in log-value
    gamma: float            # spread of |Gamma| over the simplex
    exchanges: int          # rounds of adding the worst band points to the search


def _precision(series: str) -> _Precision:
    """Exact values get the true minimax over every band point, converged finely.

    For standard values the optimum only chooses which standard values to try (two each
    side, all scored over every band point), so a fiftieth of the series' step on the
    search subset is enough.
    """
    if series == "ideal":
        return _Precision(log_value=1e-5, gamma=1e-9, exchanges=_MAX_EXCHANGES)
    return _Precision(log_value=math.log(10) / len(mantissas(series)) / 50, gamma=1e-4, exchanges=0)


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
    minimax search on log-values; with an E-series, every combination of the two
    standard values below and the two above each optimal value is tried (those in range).

    Listed: each arrangement whose best beats the bare load and every network with fewer
    parts by 0.01 dB; when none does, the one solution is the empty network ("no
    network needed"). Sorted by worst-in-band return loss, then fewer parts, then more
    power delivered.
    """
    series = check_series(series)
    f_b, z_b = band_points(freq_hz, z_load, band_hz, z0, where)
    parts = parts or ideal_library()
    f_c = 0.5 * (f_b[0] + f_b[-1])
    center = (f_c, complex(_interpolate_z(np.asarray(freq_hz, float), np.asarray(z_load, complex), f_c, z0)))
    found = []
    for family in (TOPOLOGIES, SINGLE_PARTS):
        optima = _continuous_optima(family, _precision(series), f_b, z_b, center, z0, parts)
        for layout, values in optima.items():
            if series != "ideal":
                values = _best_standard(layout, values, series, f_b, z_b, z0, parts)
            elements = tuple(Element(p, k, float(v), parts.model_for(k, float(v)))
                             for p, k, v in zip(layout.positions, layout.kinds, values))
            found.append(_evaluate(elements, layout.name, series, f_b, z_b, center, z0))
    bare = _evaluate((), "none", series, f_b, z_b, center, z0)
    listed = _worth_listing(found, bare)
    listed.sort(key=lambda s: (-s.return_loss_db, len(s.elements), -s.delivered_fraction_min, s.topology))
    return listed or [bare]
