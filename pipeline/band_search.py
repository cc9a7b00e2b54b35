"""The batched numerical band search behind :func:`pipeline.match.match_band_many`.

For a few units measured on one frequency grid, every arrangement (the eight two-part
:data:`pipeline.networks.TOPOLOGIES` and the four single parts) is optimised to maximise
the *worst* return loss over the band, all units and arrangements in the same numpy
evaluations: a coarse log grid over the part library's value ranges and the exact
single-frequency solutions at the band centre seed a batched Nelder-Mead on log-values;
with exact values the result is polished to the exact minimax (SLSQP on the epigraph
form); with an E-series the best joint choice of standard values is searched in a
re-centred window around each optimum.

Conventions (../shared/interfaces.md): elements run from the SOURCE port (reference
impedance ``z0``, ohm) toward the load; return loss is a positive number of dB,
``RL = -20 log10|Gamma_in|``; values are SI (H, F), frequencies Hz, impedances ohm.

Entry point: :func:`search_chunk`, called by :func:`pipeline.match.match_band_many` once
per chunk of units. This module does not import :mod:`pipeline.match` (which imports it):
the arrangements searched, the centre starts (from the closed form) and the result type
(:class:`pipeline.match.Solution`) are passed in. :func:`ladder_figures` (the figures of a
ladder) is shared with :mod:`pipeline.match`.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import TYPE_CHECKING

import numpy as np
from scipy.ndimage import minimum_filter
from scipy.optimize import minimize

from pipeline import metrics
from pipeline.elements import KINDS, Element, part_impedance
from pipeline.errors import MatchError
from pipeline.networks import Topology, delivered_fraction, gamma_in
from pipeline.parts import PartLibrary, mantissas, standard_values
from pipeline.units import format_si

if TYPE_CHECKING:                     # type hints only: pipeline.match imports this module
    from pipeline.match import Solution

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
_BLOCK_POINTS = 1 << 15  # candidate-frequency points scored per array pass (fits a CPU cache)
_STEP_BY_STEP_POINTS = 800  # Nelder-Mead rows x frequencies above which a step scores only needed points


def ladder_figures(ladder, z_load: np.ndarray, z0: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(worst return loss dB, return loss at the centre dB, smallest delivered fraction).

    ladder : [(position, Z), ...] source side first, each Z of the shape of ``z_load``
             (or broadcasting to it); an empty ladder is the bare load.
    z_load : (F + 1, ...) load impedance at the band points, then at the band centre.
    The worst and the smallest are taken over the band points (axis 0, the centre left out).
    """
    rl = metrics.return_loss_db(gamma_in(ladder, z_load, z0) * np.ones(z_load.shape))
    power = delivered_fraction(ladder, z_load, z0) * np.ones(z_load.shape)
    return np.min(rl[:-1], axis=0), rl[-1], np.min(power[:-1], axis=0)

# ---------------------------------------------------------------------------------------
# The band search, for U units on one frequency grid at once. A "row" is one arrangement
# of one unit (started from one seed); all rows with the same number of parts are scored
# together in one numpy evaluation of shape (frequencies, rows, candidates...), so a
# whole search is a few dozen array evaluations, not thousands of scalar ones (per-call
# overhead, not arithmetic, is what a scalar optimiser pays here). Frequency comes first
# so that the worst case over the band is an element-wise maximum of contiguous slices
# (measured: numpy reduces a short trailing axis 10-25 times slower).

@dataclass(frozen=True, eq=False)
class _Band:
    """What a band search scores against: band points, each unit's load, the library."""

    freq_hz: np.ndarray          # (F,) band points, Hz
    z_load: np.ndarray           # (F, U) load impedance of each unit there, ohm
    z0: float
    parts: PartLibrary
    center_hz: float             # band centre, Hz
    center_z: np.ndarray         # (U,) each unit's load impedance at the centre, ohm

    def subset(self, idx: np.ndarray) -> _Band:
        """The same units on some of the band points."""
        return replace(self, freq_hz=self.freq_hz[idx], z_load=self.z_load[idx])

    def unit(self, u: int) -> _Band:
        """Unit ``u`` alone (it becomes unit 0)."""
        return replace(self, z_load=self.z_load[:, [u]], center_z=self.center_z[[u]])


@dataclass(frozen=True, eq=False)
class _Family:
    """Arrangements with the same number n of parts, searched together.

    Per arrangement a: ``inductor`` (A, n) marks its inductor slots and ``lo``/``hi``
    (A, n) are the log-value bounds from the library ranges. The arrangements of one
    position order are adjacent: ``orders`` lists the orders, ``order_starts`` the
    first arrangement of each (and A). ``index`` finds an arrangement by its name.
    """

    layouts: tuple[Topology, ...]
    inductor: np.ndarray
    lo: np.ndarray
    hi: np.ndarray
    orders: tuple
    order_starts: np.ndarray
    index: dict

    @classmethod
    def of(cls, layouts, parts: PartLibrary) -> _Family:
        layouts = tuple(layouts)
        orders = tuple(dict.fromkeys(lay.positions for lay in layouts))
        order_of = [orders.index(lay.positions) for lay in layouts]
        if order_of != sorted(order_of):
            raise ValueError("arrangements of one position order must be adjacent")
        bounds = np.log([[parts.ranges[kind] for kind in lay.kinds] for lay in layouts])
        return cls(layouts, np.array([[k == "inductor" for k in lay.kinds] for lay in layouts]),
                   bounds[..., 0], bounds[..., 1], orders,
                   np.searchsorted(order_of, np.arange(len(orders) + 1)),
                   {lay.name: a for a, lay in enumerate(layouts)})

    @property
    def parts_per_layout(self) -> int:
        return self.inductor.shape[1]

    def rows(self, layout, unit) -> _Rows:
        """Rows of arrangements ``layout`` (R,), sorted, for units ``unit`` (R,)."""
        layout, unit = np.asarray(layout, dtype=int), np.asarray(unit, dtype=int)
        bounds = np.searchsorted(layout, self.order_starts).tolist()
        order_rows = {order: slice(start, stop) for order, start, stop
                      in zip(self.orders, bounds[:-1], bounds[1:]) if stop > start}
        return _Rows(self, layout, unit, order_rows)

    def every_row(self, units: int) -> _Rows:
        """Every arrangement of every unit, arrangement-major: row ``a * units + u``."""
        count = len(self.layouts)
        return self.rows(np.repeat(np.arange(count), units), np.tile(np.arange(units), count))


@dataclass(frozen=True, eq=False)
class _Rows:
    """Rows searched together: row r is arrangement ``family.layouts[layout[r]]`` of unit
    ``unit[r]``. Rows are sorted by arrangement, so each position order is one slice
    (``order_rows``); ``inductor``, ``lo``, ``hi`` (R, n) are the rows' arrangement data."""

    family: _Family
    layout: np.ndarray
    unit: np.ndarray
    order_rows: dict

    @property
    def inductor(self) -> np.ndarray:
        return self.family.inductor[self.layout]

    @property
    def lo(self) -> np.ndarray:
        return self.family.lo[self.layout]

    @property
    def hi(self) -> np.ndarray:
        return self.family.hi[self.layout]

    def take(self, idx: np.ndarray) -> _Rows:
        """Some of the rows (``idx`` rising, so they stay sorted by arrangement)."""
        return self.family.rows(self.layout[idx], self.unit[idx])


def _rows_impedances(rows: _Rows, values, freq_hz: np.ndarray, parts: PartLibrary) -> list[np.ndarray]:
    """Impedances (ohm) of every part of every row: one array (F, R, ...) per part slot.

    values : one array per part slot (source side first), each of shape (R, ...). All
             parts of one kind go through one :func:`part_impedance` call.
    """
    values = np.stack(np.broadcast_arrays(*values))                  # (n, R, ...)
    out = np.empty(freq_hz.shape + values.shape, dtype=complex)
    inductor = rows.inductor.T.reshape(rows.inductor.T.shape + (1,) * (values.ndim - 2))
    for kind, is_kind in (("inductor", inductor), ("capacitor", ~inductor)):
        pick = np.broadcast_to(is_kind, values.shape)
        flat = values[pick]
        if flat.size:
            out[:, pick] = part_impedance(kind, flat, freq_hz[:, np.newaxis], **parts.model_arrays(kind, flat))
    return list(out.transpose(1, 0, *range(2, out.ndim)))


@dataclass(frozen=True, eq=False)
class _Table:
    """Fixed part values of each kind and their impedances at some band points.

    values (V,) holds the inductor values then the capacitor values, each sorted; z (F, V)
    their impedances (ohm); ``first[kind]`` and ``count[kind]`` locate each kind. Candidates
    taken from a table (the coarse grid, the standard values) are column numbers of it, so
    a value shared by many rows and units has its impedance computed once.
    """

    values: np.ndarray
    z: np.ndarray
    first: dict
    count: dict

    @classmethod
    def of(cls, values_by_kind: dict, freq_hz: np.ndarray, parts: PartLibrary) -> _Table:
        values = np.concatenate([values_by_kind[k] for k in KINDS])
        z = np.concatenate([part_impedance(k, values_by_kind[k], freq_hz[:, np.newaxis],
                                           **parts.model_arrays(k, values_by_kind[k])) for k in KINDS], axis=1)
        sizes = [len(values_by_kind[k]) for k in KINDS]
        return cls(values, z, dict(zip(KINDS, np.cumsum([0] + sizes[:-1]).tolist())), dict(zip(KINDS, sizes)))

    def subset(self, idx: np.ndarray) -> _Table:
        """The same values at some of the band points."""
        return replace(self, z=self.z[idx])

    def ranking(self) -> _Table:
        """The same table in single precision, for ranking many candidates (see
        :func:`_reflection`)."""
        return replace(self, z=self.z.astype(np.complex64))

    def of_kind(self, inductor: np.ndarray, name: str) -> np.ndarray:
        """Per row, ``first`` or ``count`` (``name``) of the kind its slot holds."""
        table = getattr(self, name)
        return np.where(inductor, table["inductor"], table["capacitor"])


def _reflection(rows: _Rows, z_parts: list[np.ndarray], band: _Band, worst: bool = True) -> np.ndarray:
    """|Gamma_in| of every row's candidates: its largest over the band points, (R, ...),
    or (``worst=False``) at each band point, (F, R, ...).

    z_parts : per part slot (source side first), impedances (F, R, ...) broadcasting
              together, e.g. (F, R, P, 1) and (F, R, 1, P) for a P x P grid per row.
    Computed in the precision of ``z_parts``: double, or single for the tables that only
    rank many candidates (the coarse grid, the first scoring of the standard values,
    :meth:`_Table.ranking`): a relative error near 1e-7, far below any difference that
    decides a choice, at half the memory traffic. Every figure reported, and every
    comparison that picks a result, is made in double precision.
    The rows go through in blocks of about ``_BLOCK_POINTS`` points, small enough for
    the temporaries to stay in the CPU cache (measured: twice as fast as whole arrays of
    a few MB), each copied to contiguous memory first (numpy broadcasts strided inputs
    2-3 times slower).
    """
    shape = np.broadcast_shapes(*(z.shape for z in z_parts))
    precision = z_parts[0].dtype
    z_load = band.z_load[:, rows.unit].astype(precision, copy=False)
    z_load = z_load.reshape(shape[:2] + (1,) * (len(shape) - 2))
    out = np.empty(shape[1:] if worst else shape, dtype=z_load.real.dtype)
    step = max(1, _BLOCK_POINTS * shape[1] // math.prod(shape))        # rows per block
    for order, pick in rows.order_rows.items():
        for start in range(pick.start, pick.stop, step):
            block = slice(start, min(start + step, pick.stop))
            mag2 = _ladder_mag2(order, [np.ascontiguousarray(z[:, block]) for z in z_parts],
                                np.ascontiguousarray(z_load[:, block]), band.z0)
            if worst:
                out[block] = np.max(mag2, axis=0)
            else:
                out[:, block] = mag2
    return np.sqrt(out, out=out)


def _ladder_mag2(order: tuple[str, ...], z_parts: list[np.ndarray], z_load: np.ndarray,
                 z0: float) -> np.ndarray:
    """|Gamma_in|**2 of a ladder with positions ``order`` (source side first).

    The parts are combined from the load toward the source, so the load-side ones, which
    broadcast over fewer candidate axes, meet the load while the arrays are small. The
    source-side part is added last, as an impedance (series) or an admittance (shunt):
    with S that sum and s0 = z0 (or 1/z0), |Gamma|**2 = |S - s0|**2 / |S + s0|**2, formed
    from real arrays. Same value as :func:`pipeline.networks.gamma_in` (rounding aside).
    """
    z = z_load
    for position, z_part in zip(order[:0:-1], z_parts[:0:-1]):
        z = z + z_part if position == "series" else z * z_part / (z + z_part)
    if order[0] == "series":
        near, part, ref = z, z_parts[0], z0
    else:
        near, part, ref = 1 / z, 1 / z_parts[0], 1 / z0
    real = near.real + part.real
    imag2 = near.imag + part.imag
    np.square(imag2, out=imag2)
    num = real - ref
    np.square(num, out=num)
    num += imag2
    real += ref
    np.square(real, out=real)
    real += imag2
    num /= real
    return num


def _rows_cost(rows: _Rows, points: np.ndarray, band: _Band) -> np.ndarray:
    """Worst |Gamma| over the band at log-value ``points`` (R, K, n); shape (R, K)."""
    values = [np.exp(points[..., s]) for s in range(points.shape[-1])]
    return _reflection(rows, _rows_impedances(rows, values, band.freq_hz, band.parts), band)


def _grid_worst(rows: _Rows, axes: list[np.ndarray], table: _Table, band: _Band) -> np.ndarray:
    """Worst |Gamma| (R, P**n) of every combination of the candidates ``axes[s]`` (R, P),
    columns of ``table`` (at the points of ``band``), of each part slot s, row by row
    (combinations in C order)."""
    n, count = len(axes), rows.layout.size
    z_parts = [table.z[:, axes[s]].reshape((table.z.shape[0], count) + tuple(
        axes[s].shape[1] if t == s else 1 for t in range(n))) for s in range(n)]
    return _reflection(rows, z_parts, band).reshape(count, -1)


def _grid_values(axes: list[np.ndarray], combos: np.ndarray) -> np.ndarray:
    """Candidates (R, K, n) of the grid combinations ``combos`` (R, K) (see _grid_worst)."""
    picks = np.unravel_index(combos, tuple(axis.shape[1] for axis in axes))
    return np.stack([np.take_along_axis(axis, pick, axis=1) for axis, pick in zip(axes, picks)], axis=-1)


def _spread(n_points: int, at_most: int) -> np.ndarray:
    """Indices of at most ``at_most`` evenly spread points out of ``n_points``, ends included."""
    return np.unique(np.linspace(0, n_points - 1, min(n_points, at_most)).round().astype(int))


def _smallest(values: np.ndarray, k: int) -> np.ndarray:
    """Column indices (R, k) of the k smallest of each row of ``values``, smallest first
    (the first column on ties, as a stable sort)."""
    if k == 1:
        return np.argmin(values, axis=1)[:, None]
    return np.argsort(values, axis=1, kind="stable")[:, :k]


def _grid_table(families: list[_Family], band: _Band) -> _Table:
    """The coarse log grid over each kind's library range, at ``_GRID_MAX_FREQS`` band points."""
    decades = max(np.max(fam.hi - fam.lo) for fam in families) / math.log(10)
    count = math.ceil(decades * _GRID_PER_DECADE) + 1
    values = {k: np.geomspace(*band.parts.ranges[k], count) for k in KINDS}
    return _Table.of(values, band.freq_hz, band.parts).ranking()


def _coarse_grid(rows: _Rows, grid: _Table, band: _Band, seeds: int) -> np.ndarray:
    """Log-values (R, seeds, n): per row, the best local minima of the log grid ``grid``
    (at the points of ``band``), the best point repeated where there are fewer, best first."""
    n = rows.inductor.shape[1]
    count = grid.count["inductor"]
    axes = [grid.of_kind(rows.inductor[:, s], "first")[:, None] + np.arange(count) for s in range(n)]
    worst = _grid_worst(rows, axes, grid, band)
    if seeds == 1:                          # the best local minimum is the best point
        picks = _smallest(worst, 1)
    else:
        cube = worst.reshape((-1,) + (count,) * n)
        is_min = (cube == minimum_filter(cube, size=(1,) + (3,) * n, mode="nearest")).reshape(worst.shape)
        picks = _smallest(np.where(is_min, worst, np.inf), seeds)
        found = np.minimum(np.count_nonzero(is_min, axis=1), seeds)    # >= 1
        picks = np.where(np.arange(seeds) < found[:, None], picks, picks[:, :1])
    return np.log(grid.values[_grid_values(axes, picks)])


def _nelder_mead(rows: _Rows, x0, step, precision, band: _Band) -> np.ndarray:
    """Nelder-Mead on every row at once, minimising its worst |Gamma| from log-values x0 (R, n).

    The textbook method with scipy's coefficients (reflect 1, expand 2, contract 0.5,
    shrink 0.5) and its convergence test (simplex and values within ``precision``),
    run in lockstep (see :func:`_nelder_mead_step`). Each row stops on that test, as
    it would searched alone, so no result depends on the rows or units beside it.
    Candidates are clipped to the library ranges. Nelder-Mead only compares values
    and its simplex stretches along the ridges that a max over frequency forms, where a
    fixed-stencil search stalls (measured: 0.03 dB short on a two-edge ridge). scipy's
    own Nelder-Mead, one row at a time from the same seeds to the same precision, finds
    the same optima but makes one scalar call per candidate, each paying numpy's
    per-call overhead: the whole band match of tests/benchmarks/bench_match.py took
    about 1.5 times as long (79 ms against 48 ms with E24 values, 54 ms against 37 ms
    with exact values, on a shared 2-core machine).
    """
    n = x0.shape[1]
    sign = np.where(x0 + step > rows.hi, -1.0, 1.0)[:, None, :]        # stay inside at a bound
    simplex = np.clip(x0[:, None, :] + step * np.vstack([np.zeros(n), np.eye(n)]) * sign,
                      rows.lo[:, None, :], rows.hi[:, None, :])
    values = _rows_cost(rows, simplex, band)
    active = np.arange(rows.layout.size)
    for _ in range(_MAX_SEARCH_STEPS):
        simplex[active], values[active] = _sort_vertices(simplex[active], values[active])
        active = _not_converged(active, simplex, values, precision)
        if not active.size:
            break
        simplex[active], values[active] = _nelder_mead_step(rows, active, simplex[active],
                                                            values[active], band)
    return simplex[np.arange(rows.layout.size), np.argmin(values, axis=1)]


def _sort_vertices(simplex: np.ndarray, values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Each row's simplex (R, n + 1, n) and values (R, n + 1), best vertex first (stable)."""
    rows, vertices = values.shape
    pick = (np.argsort(values, axis=1, kind="stable") + vertices * np.arange(rows)[:, None]).ravel()
    return simplex.reshape(rows * vertices, -1)[pick].reshape(simplex.shape), values.ravel()[pick].reshape(values.shape)


def _not_converged(active: np.ndarray, simplex, values, precision) -> np.ndarray:
    """The ``active`` rows outside the convergence test (simplex or values too spread)."""
    s, v = simplex[active], values[active]
    spread = np.ascontiguousarray(np.abs(s[:, 1:] - s[:, :1]).reshape(active.size, -1).T)
    open_row = (spread.max(axis=0) > precision.log_value) | (v[:, -1] - v[:, 0] > precision.gamma)
    return active[open_row]


def _nelder_mead_step(rows: _Rows, active: np.ndarray, simplex: np.ndarray, values: np.ndarray,
                      band: _Band) -> tuple[np.ndarray, np.ndarray]:
    """One Nelder-Mead iteration of the rows ``active``, whose sorted simplices (A, n + 1, n)
    and values (A, n + 1) are given (and updated in place): the worst vertex is replaced
    by the reflected, expanded or contracted point, or the simplex shrinks toward its best
    vertex.

    Each row's rule needs its reflected point, then at most one more (the expanded, or
    the outside or inside contraction, chosen by the reflected value), then the shrink
    points if that contraction failed. Many rows are scored in up to three evaluations
    holding only the points some row needs; a few rows (fewer than
    ``_STEP_BY_STEP_POINTS`` row-frequency points) in one evaluation of every point any
    rule could need, since then the cost of an evaluation is mostly its fixed overhead.
    The decisions are the same either way.
    """
    mine = rows.take(active)
    lo, hi = mine.lo[:, None, :], mine.hi[:, None, :]
    f_best, f_next, f_worst = values[:, 0].copy(), values[:, -2].copy(), values[:, -1].copy()
    centroid = np.einsum("avk->ak", simplex[:, :-1]) / (simplex.shape[1] - 1)   # of all but the worst
    toward = centroid - simplex[:, -1]

    def score(which, points):               # clipped points (k, m, n) and their worst |Gamma|
        points = np.clip(points, lo[which], hi[which])
        return points, _rows_cost(mine.take(which), points, band)

    def shrunk(which):                      # (k, n, n) the vertices halfway to the best one
        s = simplex[which]
        return s[:, :1] + 0.5 * (s[:, 1:] - s[:, :1])

    everyone = np.arange(active.size)
    if active.size * band.freq_hz.size < _STEP_BY_STEP_POINTS:
        coefs = np.array([1.0, 2.0, 0.5, -0.5])         # reflect, expand, contract out / in
        points, cost = score(everyone, np.concatenate(
            [centroid[:, None, :] + coefs[:, None] * toward[:, None, :], shrunk(everyone)], axis=1))

        def second_point(which, c):
            col = np.where(c == 2.0, 1, np.where(c == 0.5, 2, 3))      # the column of coefs
            return points[which, col], cost[which, col]

        def shrink_points(which):
            return points[which, 4:], cost[which, 4:]
    else:
        points, cost = score(everyone, (centroid + toward)[:, None, :])

        def second_point(which, c):
            p, f = score(which, (centroid[which] + c[:, None] * toward[which])[:, None, :])
            return p[:, 0], f[:, 0]

        def shrink_points(which):
            return score(which, shrunk(which))
    new, f_new = points[:, 0].copy(), cost[:, 0].copy()                  # reflected
    coef = np.where(f_new < f_best, 2.0, np.where(f_new < f_next, 0.0, np.where(f_new < f_worst, 0.5, -0.5)))
    second = np.flatnonzero(coef)
    shrink = np.zeros(active.size, dtype=bool)
    if second.size:
        c = coef[second]
        tried, f_tried = second_point(second, c)
        taken = np.where(c == 2.0, f_tried < f_new[second],
                         np.where(c == 0.5, f_tried <= f_new[second], f_tried < f_worst[second]))
        new[second[taken]], f_new[second[taken]] = tried[taken], f_tried[taken]
        shrink[second[~taken & (c != 2.0)]] = True            # a contraction that failed
    keep = ~shrink
    simplex[keep, -1], values[keep, -1] = new[keep], f_new[keep]
    if shrink.any():
        which = np.flatnonzero(shrink)
        simplex[which, 1:], values[which, 1:] = shrink_points(which)
    return simplex, values


def _distinct(seeds: np.ndarray) -> np.ndarray:
    """(R, k) mask of the seeds (R, k, n) that differ from every earlier seed of their row."""
    same = np.all(seeds[:, :, None, :] == seeds[:, None, :, :], axis=-1)
    earlier = np.tril(np.ones(same.shape[1:], dtype=bool), -1)
    return ~np.any(same & earlier, axis=2)


def _starts(family: _Family, grid_seeds: np.ndarray, units: int, center_starts: list) -> tuple:
    """Where each search starts: (layout (S,), unit (S,), log-values (S, n)).

    Per unit and arrangement: its distinct grid seeds (best first), then the exact
    single-frequency solutions at the band centre with this arrangement (from
    ``center_starts``, see ``pipeline.match._center_starts``). Sorted by arrangement,
    then unit, so the position orders stay adjacent.
    """
    every = family.every_row(units)
    row, rank = np.nonzero(_distinct(grid_seeds))
    mine = [(family.index[name], u, grid_seeds.shape[1] + i, start)
            for u, i, name, start in center_starts if name in family.index]
    layout = np.concatenate([every.layout[row], [a for a, _, _, _ in mine]]).astype(int)
    unit = np.concatenate([every.unit[row], [u for _, u, _, _ in mine]]).astype(int)
    ranks = np.concatenate([rank, [r for _, _, r, _ in mine]])
    start = np.concatenate([grid_seeds[row, rank]] + [s[None] for _, _, _, s in mine])
    order = np.lexsort((ranks, unit, layout))
    return layout[order], unit[order], start[order]


def _first_best(group: np.ndarray, worst: np.ndarray) -> np.ndarray:
    """Per group (``group`` rising), the row with the smallest ``worst``, the first on ties."""
    order = np.lexsort((np.arange(group.size), worst, group))
    return order[np.concatenate(([True], group[order][1:] != group[order][:-1]))]


def _continuous_optima(family: _Family, precision: _Precision, band: _Band, grid: _Table,
                       center_starts: list) -> np.ndarray:
    """Each arrangement's best part values (R, n) for each unit over the band, within the
    library ranges, in the row order of ``family.every_row``.

    Each arrangement is searched (on a subset of the band points) from the best local
    minima of the coarse grid (``precision.grid_seeds``) and from each exact solution at
    the band centre, all at once; the best of its searches over the whole band wins, and
    is polished to the exact minimax when ``precision.polish``.
    """
    units = band.center_z.size
    grid_band = band.subset(_spread(band.freq_hz.size, _GRID_MAX_FREQS))
    seeds = _coarse_grid(family.every_row(units), grid, grid_band, precision.grid_seeds)
    layout, unit, starts = _starts(family, seeds, units, center_starts)
    rows = family.rows(layout, unit)
    search = band.subset(_spread(band.freq_hz.size, _SEARCH_MAX_FREQS))
    x = _nelder_mead(rows, np.clip(starts, rows.lo, rows.hi), _FIRST_STEP, precision, search)
    worst = _rows_cost(rows, x[:, None, :], band)[:, 0]
    best = x[_first_best(layout * units + unit, worst)]
    if precision.polish:
        for r, (a, u) in enumerate(zip(np.repeat(np.arange(len(family.layouts)), units),
                                       np.tile(np.arange(units), len(family.layouts)))):
            best[r] = _polish(family.rows([a], [0]), best[r], band.unit(u))
    return np.exp(best)


def _worst_points(mag: np.ndarray) -> np.ndarray:
    """Band-point indices where the worst case lives: the local maxima of |Gamma| over
    frequency (band edges included) within ``_POLISH_MARGIN`` of the largest, and their
    neighbours."""
    padded = np.concatenate(([-np.inf], mag, [-np.inf]))
    peak = (mag >= padded[:-2]) & (mag >= padded[2:]) & (mag >= (1 - _POLISH_MARGIN) * mag.max())
    peaks = np.flatnonzero(peak)
    return np.unique(np.clip(np.concatenate([peaks - 1, peaks, peaks + 1]), 0, mag.size - 1))


def _mags(row: _Rows, log_values: np.ndarray, band: _Band) -> np.ndarray:
    """|Gamma| (K, F) over the band points of one row at log-values (K, n)."""
    values = [np.exp(log_values[None, :, s]) for s in range(log_values.shape[1])]
    z_parts = _rows_impedances(row, values, band.freq_hz, band.parts)
    return _reflection(row, z_parts, band, worst=False)[:, 0].T


def _epigraph_slsqp(row: _Rows, x: np.ndarray, band: _Band) -> np.ndarray:
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
            memo.clear()
            memo[key] = _mags(row, log_v + shifts, band)
        return memo[key]

    def gap(y):                             # t - |Gamma(f_i)| >= 0
        return y[n] - mags(y[:n])[0]

    def gap_jacobian(y):
        m = mags(y[:n])
        return np.hstack([-(m[1:] - m[0]).T / _FD_STEP, np.ones((m.shape[1], 1))])

    bounds = list(zip(row.lo[0], row.hi[0])) + [(0.0, None)]
    result = minimize(lambda y: y[n], np.append(x, mags(x)[0].max()), jac=lambda y: np.eye(n + 1)[n],
                      method="SLSQP", bounds=bounds, options={"ftol": 1e-12, "maxiter": 100},
                      constraints=[{"type": "ineq", "fun": gap, "jac": gap_jacobian}])
    return np.clip(result.x[:n], row.lo[0], row.hi[0])


def _polish(row: _Rows, x: np.ndarray, band: _Band) -> np.ndarray:
    """Sharpen a search result ``x`` (log-values, (n,)) of one row (of unit 0 of ``band``)
    to the exact minimax over the band.

    The minimax is posed in its smooth epigraph form (:func:`_epigraph_slsqp`), which
    scipy's SLSQP follows along the ridges where the max over frequency has kinks
    (Nelder-Mead can stall on a narrow one: measured 7.891 dB where 7.896 dB was
    possible). The constraints are the points around the highest peaks of |Gamma| over
    frequency (SLSQP's cost grows fast with their number); when the result peaks
    elsewhere, the new peaks join and it is solved again.
    The result is kept only if it is better over every band point.
    """
    def mag(log_v):
        return _mags(row, log_v[None], band)[0]

    start_worst = mag(x).max()
    points, y = _worst_points(mag(x)), x
    for _ in range(_POLISH_ROUNDS):
        y = _epigraph_slsqp(row, y, band.subset(points))
        now = mag(y)
        if np.argmax(now) in points:
            break
        points = np.union1d(points, _worst_points(now))
    return y if mag(y).max() < start_worst else x


# ---------------------------------------------------------------------------------------
# Standard values

@dataclass(frozen=True, eq=False)
class _Standard:
    """The standard values a search may pick: ``table`` holds every value of the series
    inside the library range of each kind (with impedances at every band point),
    ``coarse`` the same at ``_SNAP_MAX_FREQS`` of them; ``series_values`` is the whole
    series (every decade) and ``series_first[kind]`` where the kind's range starts in it."""

    table: _Table
    coarse: _Table
    coarse_points: np.ndarray
    series_values: np.ndarray
    series_first: dict

    @classmethod
    def of(cls, series: str, band: _Band) -> _Standard:
        parts = band.parts
        values = {}
        for kind in KINDS:
            lo, hi = parts.ranges[kind]
            values[kind] = standard_values(series, lo, hi)
            if not values[kind].size:
                unit = "H" if kind == "inductor" else "F"
                raise MatchError(f"the part library has no {series} {kind} between "
                                 f"{format_si(lo, unit)} and {format_si(hi, unit)}", where=parts.path)
        table = _Table.of(values, band.freq_hz, parts)
        points = _spread(band.freq_hz.size, _SNAP_MAX_FREQS)
        everything = standard_values(series, 0.0, math.inf)
        return cls(table, table.subset(points).ranking(), points, everything,
                   {k: int(np.searchsorted(everything, values[k][0])) for k in KINDS})

    def window(self, inductor: np.ndarray, centres: np.ndarray) -> np.ndarray:
        """Per row, the columns of ``table`` tried for one part of kind ``inductor`` (R,):
        the ``_SNAP_WINDOW`` standard values below and above ``centres`` (R,) inside the
        library range, padded by repeating the last one (always at least the in-range
        value nearest to the centre): (R, 2 * _SNAP_WINDOW)."""
        first = np.where(inductor, self.series_first["inductor"], self.series_first["capacitor"])
        count = self.table.of_kind(inductor, "count")
        at = np.searchsorted(self.series_values, centres * (1 + 1e-12), side="right")
        lo, hi = np.maximum(at - _SNAP_WINDOW, first), np.minimum(at + _SNAP_WINDOW, first + count)
        empty = hi <= lo                                   # the range lies beyond the window
        lo = np.where(empty, np.where(at + _SNAP_WINDOW <= first, 0, count - 1), lo - first)
        hi = np.where(empty, lo + 1, hi - first)
        cols = np.minimum(lo[:, None] + np.arange(2 * _SNAP_WINDOW), hi[:, None] - 1)
        return self.table.of_kind(inductor, "first")[:, None] + cols


def _windows(rows: _Rows, centres: np.ndarray, standard: _Standard) -> np.ndarray:
    """Per row and part slot, the standard values tried around ``centres`` (R, n): the
    table columns (R, n, 2 * _SNAP_WINDOW) of :meth:`_Standard.window`."""
    return np.stack([standard.window(rows.inductor[:, s], centres[:, s])
                     for s in range(centres.shape[1])], axis=1)


def _best_in_window(rows: _Rows, windows: np.ndarray, standard: _Standard,
                    band: _Band) -> tuple[np.ndarray, np.ndarray]:
    """Per row, the best combination of the standard values ``windows`` (R, n, P).

    Every combination is scored on the coarse subset of the band points, and the
    ``_SNAP_FINALISTS`` best of each row are scored again on every band point.
    Returns the table columns (R, n) and their worst |Gamma| over the band (R,).
    """
    axes = list(windows.transpose(1, 0, 2))
    worst = _grid_worst(rows, axes, standard.coarse, band.subset(standard.coarse_points))
    cand = _grid_values(axes, _smallest(worst, _SNAP_FINALISTS))
    worst = _reflection(rows, [standard.table.z[:, cand[..., s]] for s in range(cand.shape[-1])], band)
    best, r = np.argmin(worst, axis=1), np.arange(rows.layout.size)
    return cand[r, best], worst[r, best]


def _best_standard(rows: _Rows, values: np.ndarray, standard: _Standard, band: _Band) -> np.ndarray:
    """Per row, the best joint choice of standard values near the optimum ``values`` (R, n).

    Near-optimal networks lie along a valley in (log L, log C), and the best standard pair
    can sit well away from the continuous optimum along it. So the window of standard
    values is re-centred on the best pair found, for the rows where that improved the
    worst-in-band match, until none improves (``_SNAP_ROUNDS`` rounds at most). A row
    whose re-centred window is the window it was just scored on cannot improve and is
    not scored again.
    """
    windows = _windows(rows, values, standard)
    best, score = _best_in_window(rows, windows, standard, band)
    active = np.arange(rows.layout.size)
    for _ in range(_SNAP_ROUNDS - 1):
        moved_windows = _windows(rows.take(active), standard.table.values[best[active]], standard)
        changed = np.any(moved_windows != windows[active], axis=(1, 2))
        active, moved_windows = active[changed], moved_windows[changed]
        if not active.size:
            break
        moved, moved_score = _best_in_window(rows.take(active), moved_windows, standard, band)
        better = moved_score < score[active]
        if not better.any():
            break
        active = active[better]
        windows[active] = moved_windows[better]
        best[active], score[active] = moved[better], moved_score[better]
    return standard.table.values[best]


# ---------------------------------------------------------------------------------------
# The search and its results

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


def _row_figures(rows: _Rows, values: np.ndarray, band: _Band) -> np.ndarray:
    """(3, R): worst return loss dB, return loss at the centre dB, smallest delivered
    fraction, of each row's network with part values ``values`` (R, n)."""
    f = np.append(band.freq_hz, band.center_hz)
    z_load = np.vstack([band.z_load, band.center_z])[:, rows.unit]
    z_parts = _rows_impedances(rows, list(values.T), f, band.parts)
    out = np.empty((3, rows.layout.size))
    for order, pick in rows.order_rows.items():
        out[:, pick] = ladder_figures(list(zip(order, (z[:, pick] for z in z_parts))), z_load[:, pick], band.z0)
    return out


def _solutions(families: list[_Family], optima: list[np.ndarray], band: _Band,
               series: str, solution: type[Solution]) -> list[list[Solution]]:
    """Per unit, the networks worth listing (see :func:`pipeline.match.match_band`), best first.

    optima   : per family, the part values (R, n) of each row of ``family.every_row``.
    solution : the result type, :class:`pipeline.match.Solution`.
    """
    units = band.center_z.size
    bare = ladder_figures([], np.vstack([band.z_load, band.center_z]), band.z0)
    best_simpler = {0: bare[0]}           # parts -> best worst-in-band RL (U,) with that many
    listed = []
    for fam, values in sorted(zip(families, optima), key=lambda pair: pair[0].parts_per_layout):
        n, count = fam.parts_per_layout, len(fam.layouts)
        fig = _row_figures(fam.every_row(units), values, band).reshape(3, count, units)
        bar = np.max([rl for m, rl in best_simpler.items() if m < n], axis=0)
        listed.append((fam, values.reshape(count, units, n), fig, fig[0] > bar + _MIN_GAIN_DB))
        best_simpler[n] = np.max(fig[0], axis=0)
    out, elements = [], {}                # parts shared by many units are made once
    for u in range(units):
        found = [_solution(fam.layouts[a], values[a, u], fig[:, a, u], series, band.parts, elements,
                           solution)
                 for fam, values, fig, keep in listed for a in np.flatnonzero(keep[:, u])]
        found.sort(key=lambda s: (-s.return_loss_db, len(s.elements), -s.delivered_fraction_min, s.topology))
        out.append(found or [solution((), "none", *(float(b[u]) for b in bare), series)])
    return out


def _solution(layout: Topology, values: np.ndarray, figures: np.ndarray, series: str,
              parts: PartLibrary, elements: dict, solution: type[Solution]) -> Solution:
    """The ``solution`` (:class:`pipeline.match.Solution`) of ``layout`` with part ``values``
    (n,) and its ``figures`` (3,); ``elements`` keeps the parts made so far, by
    (position, kind, value)."""
    made = []
    for key in zip(layout.positions, layout.kinds, values.tolist()):
        if key not in elements:
            position, kind, value = key
            elements[key] = Element(position, kind, value, parts.model_for(kind, value))
        made.append(elements[key])
    return solution(tuple(made), layout.name, *figures.tolist(), series)


def search_chunk(f_b: np.ndarray, z_b: np.ndarray, center_z: np.ndarray, z0: float,
                 series: str, parts: PartLibrary, arrangements: tuple[tuple[Topology, ...], ...],
                 center_starts: list, solution: type[Solution]) -> list[list[Solution]]:
    """:func:`pipeline.match.match_band_many` on the band points ``f_b`` (F,) of a few units
    ``z_b`` (U, F).

    center_z      : (U,) each unit's load impedance (ohm) at the band centre.
    series        : ``"ideal"`` or a checked E-series name.
    arrangements  : the sets of arrangements searched, each set with one number of parts
                    (:data:`pipeline.networks.TOPOLOGIES`, :data:`pipeline.match.SINGLE_PARTS`).
    center_starts : the exact solutions at the band centre as search starts, (unit, rank,
                    arrangement name, log-values), see ``pipeline.match._center_starts``.
    solution      : the result type, :class:`pipeline.match.Solution`.
    Returns one solution list per unit, best first.
    """
    band = _Band(f_b, np.ascontiguousarray(z_b.T), float(z0), parts, 0.5 * (f_b[0] + f_b[-1]), center_z)
    families = [_Family.of(layouts, parts) for layouts in arrangements]
    grid = _grid_table(families, band.subset(_spread(f_b.size, _GRID_MAX_FREQS)))
    standard = _Standard.of(series, band) if series != "ideal" else None
    optima = []
    for family in families:
        values = _continuous_optima(family, _precision(series), band, grid, center_starts)
        if standard is not None:
            values = _best_standard(family.every_row(center_z.size), values, standard, band)
        optima.append(values)
    return _solutions(families, optima, band, series, solution)
