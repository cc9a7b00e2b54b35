"""A whole production lot: one standard-valued network for every unit, and its yield.

Conventions (../shared/interfaces.md): elements run from the source port toward the
load; return loss is positive dB, ``RL = -20 log10|Gamma_in|``; values are SI (H, F, Hz,
ohm).

* :class:`LotData` holds the lot's units on one common in-band frequency grid;
  :func:`common_band_grid` builds it from sweeps that need not share frequencies.
* :func:`passes` and :func:`yield_at_spec` are THE definition of a passing unit (worst
  in-band return loss ``>= spec``) and of yield; the search, the Monte Carlo and any
  re-check use them, and every result carries the per-unit worst RL it was computed from.
* :func:`shared_network` picks the network that maximises the lot's yield (ties: the
  larger median worst RL) over every two-part topology and the standard values near the
  per-unit optima.
* :func:`tolerance_yield` predicts the production yield of a network when its parts vary
  within their tolerances (Monte Carlo, seeded, with a Wilson 95 % interval).

How the shared search stays fast and exact
    A worst-case RL taken over a subset of the band's frequencies can only be higher than
    over the whole band, so a candidate's pass count and median worst RL on a subset are
    upper bounds of the true ones. Every candidate is first scored on a few frequencies
    (band edges included); the best-looking one is evaluated exactly; every candidate whose
    bound is below that exact result is dropped; the survivors are scored on more
    frequencies, and so on, until the last survivors are scored on the full grid. The
    winner is the same as a brute-force evaluation of every candidate on every frequency.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Sequence

import numpy as np
from scipy import stats

from pipeline import metrics
from pipeline.elements import Element, part_impedance
from pipeline.errors import MatchError
from pipeline.match import Solution, band_points, match_band, worst_return_loss
from pipeline.networks import TOPOLOGIES, Topology, gamma_in, reflection
from pipeline.parts import PartLibrary, check_series, ideal_library, nearest_standard, \
    neighbours, standard_values
from pipeline.sweep import Sweep

CHUNK_ELEMENTS = 2 ** 20
"""Complex values per scoring call (16 MB per array; the cascade's temporaries stay
well under 200 MB). Measured fastest here: larger calls run slower (cache misses)."""

SCREEN_POINTS = (9, 33)
"""Frequencies (edges included) of the successive screening passes before the full grid."""

OPTIMA_UNITS = 32
"""Units (evenly spread over the lot) whose continuous optima seed the candidate values
when no per-unit solutions are given; match_band costs about 50 ms a unit here."""

DISTRIBUTIONS = ("uniform", "normal-3sigma")
"""Part-value distributions of the Monte Carlo (see :func:`tolerance_yield`)."""

_BOUND_SLACK_DB = 1e-9   # keeps screening bounds valid against last-digit rounding


# ---------------------------------------------------------------------------------------
# The lot's data and the one definition of yield

@dataclass(frozen=True, eq=False)
class LotData:
    """Every unit of a lot on one common frequency grid inside the band.

    unit_ids : (U,) unit names (DUT ids), unique.
    freq_hz  : (F,) strictly rising frequencies, Hz: the band, edges included.
    z_load   : (U, F) complex load impedance of each unit at those frequencies, ohm.
    z0       : real reference impedance the network matches to, ohm.
    """

    unit_ids: tuple[str, ...]
    freq_hz: np.ndarray
    z_load: np.ndarray
    z0: float = 50.0

    def __post_init__(self):
        ids = tuple(str(u) for u in self.unit_ids)
        f = np.asarray(self.freq_hz, dtype=float)
        z = np.asarray(self.z_load, dtype=complex)
        object.__setattr__(self, "unit_ids", ids)
        object.__setattr__(self, "freq_hz", f)
        object.__setattr__(self, "z_load", z)
        if not ids:
            raise MatchError("the lot holds no units")
        if len(set(ids)) != len(ids):
            duplicate = next(u for u in ids if ids.count(u) > 1)
            raise MatchError(f"unit id {duplicate!r} appears more than once in the lot")
        if f.ndim != 1 or f.size < 2 or np.any(np.diff(f) <= 0) or not np.all(np.isfinite(f)):
            raise MatchError("the lot's frequency grid must be 1-D, finite and strictly rising")
        if z.shape != (len(ids), f.size):
            raise MatchError(f"lot impedances have shape {z.shape}, expected "
                             f"({len(ids)} units, {f.size} frequencies)")
        if not np.all(np.isfinite(z)):
            raise MatchError("NaN or infinite impedance in the lot")
        bad = np.flatnonzero(np.any(z.real <= 0, axis=1))
        if bad.size:
            raise MatchError(f"unit {ids[bad[0]]!r}: load resistance not positive in the band "
                             "(not a passive load)")
        if not self.z0 > 0:
            raise MatchError(f"reference impedance {self.z0} ohm must be positive")

    @property
    def n_units(self) -> int:
        return len(self.unit_ids)

    @property
    def band_hz(self) -> tuple[float, float]:
        return float(self.freq_hz[0]), float(self.freq_hz[-1])


def _as_unit(item, z0: float) -> tuple[str, np.ndarray, np.ndarray]:
    """(unit id, freq_hz, z_ohm) from a Sweep or a (unit_id, freq_hz, s11 at z0) tuple."""
    if isinstance(item, Sweep):
        unit_id = item.provenance.dut_id or item.provenance.source
        return unit_id, item.freq_hz, item.z_ohm
    unit_id, freq_hz, s11 = item
    s11 = np.asarray(s11, dtype=complex)
    return str(unit_id), np.asarray(freq_hz, dtype=float), z0 * (1 + s11) / (1 - s11)


def common_band_grid(units: Sequence, band_hz: tuple[float, float], points: int | None = None,
                     z0: float = 50.0) -> LotData:
    """Put every unit of a lot on one frequency grid spanning ``band_hz``.

    units   : :class:`~pipeline.sweep.Sweep` objects (id: ``provenance.dut_id``), or
              ``(unit_id, freq_hz, s11)`` tuples with S11 at ``z0``.
    band_hz : (lo, hi) in Hz; it must lie inside every unit's sweep.
    points  : grid size, evenly spaced from lo to hi. None: when every unit was swept on
              the same frequencies, the grid a single-unit band match scores on (the
              measured points in the band plus both edges, see
              :func:`pipeline.match.band_points`), so no measured point is altered;
              otherwise evenly spaced with as many points as the densest unit has there.

    Values between measured points are interpolated linearly in the real and imaginary
    parts of the reflection coefficient at ``z0``, as :mod:`pipeline.match` does. A unit
    whose sweep misses the band, or that is not passive there, raises
    :class:`MatchError` naming it.
    """
    records = [_as_unit(item, z0) for item in units]
    if not records:
        raise MatchError("the lot holds no units")
    if points is not None and points < 3:
        raise MatchError(f"a lot grid needs at least 3 points, not {points}")
    in_band = [(uid, *band_points(f, z, band_hz, z0, where=uid)) for uid, f, z in records]
    same_sweep = all(np.array_equal(records[0][1], f) for _, f, _ in records)
    if points is None and same_sweep:
        grid = in_band[0][1]
    else:
        n = points or max(f_b.size for _, f_b, _ in in_band)
        grid = np.linspace(float(band_hz[0]), float(band_hz[1]), n)
    gammas = []
    for _, f_b, z_b in in_band:
        g = reflection(z_b, z0)
        gammas.append(np.interp(grid, f_b, g.real) + 1j * np.interp(grid, f_b, g.imag))
    gamma = np.array(gammas)
    return LotData(tuple(uid for uid, _, _ in in_band), grid, z0 * (1 + gamma) / (1 - gamma), z0)


def passes(worst_rl_db, spec_rl_db: float) -> np.ndarray:
    """True where a worst in-band return loss meets the spec (``>= spec_rl_db``)."""
    return np.asarray(worst_rl_db, dtype=float) >= spec_rl_db


def yield_at_spec(worst_rl_db: np.ndarray, spec_rl_db: float) -> float:
    """Fraction (0..1) of units whose worst in-band return loss is ``>= spec_rl_db``."""
    ok = passes(worst_rl_db, spec_rl_db)
    if ok.size == 0:
        raise ValueError("yield of an empty set of units")
    return float(np.count_nonzero(ok) / ok.size)


# ---------------------------------------------------------------------------------------
# Scoring candidates over the lot, in memory-bounded chunks

def _lot_worst_rl(topology: Topology, v1: np.ndarray, v2: np.ndarray, freq_hz: np.ndarray,
                  z_load: np.ndarray, z0: float, parts: PartLibrary) -> np.ndarray:
    """(U, K) worst RL of K candidates (v1[k], v2[k]) on every unit of z_load (U, F)."""
    n_units, n_freq = z_load.shape
    units_per_call = max(1, min(n_units, CHUNK_ELEMENTS // n_freq))
    cands_per_call = max(1, CHUNK_ELEMENTS // (units_per_call * n_freq))
    out = np.empty((n_units, v1.size))
    for a in range(0, n_units, units_per_call):
        zl = z_load[a:a + units_per_call, np.newaxis, :]
        for k in range(0, v1.size, cands_per_call):
            out[a:a + units_per_call, k:k + cands_per_call] = worst_return_loss(
                topology, v1[k:k + cands_per_call], v2[k:k + cands_per_call], freq_hz, zl, z0, parts)
    return out


def _screen_levels(n_freq: int) -> list[np.ndarray]:
    """Nested frequency-index subsets, coarse to full; each includes both band edges."""
    levels, chosen = [], np.array([], dtype=int)
    for n in SCREEN_POINTS:
        if n >= n_freq:
            break
        chosen = np.union1d(chosen, np.linspace(0, n_freq - 1, n).round().astype(int))
        levels.append(chosen)
    levels.append(np.arange(n_freq))
    return levels


def _best_index(n_pass: np.ndarray, median: np.ndarray) -> int:
    """Index of the most passing units, then the largest median; first of equals."""
    return int(np.lexsort((-median, -n_pass))[0])


def _search_grid(topology: Topology, v1: np.ndarray, v2: np.ndarray, lot: LotData,
                 spec_rl_db: float, parts: PartLibrary) -> tuple[int, np.ndarray]:
    """Index of the best candidate (ties: the lowest index) and its (U,) worst RL.

    Bound-and-prune over nested frequency subsets (module docstring): the result equals
    scoring every candidate on every frequency.
    """
    levels = _screen_levels(lot.freq_hz.size)
    alive = np.arange(v1.size)
    best_key = None
    for idx in levels[:-1]:
        rl = _lot_worst_rl(topology, v1[alive], v2[alive], lot.freq_hz[idx], lot.z_load[:, idx],
                           lot.z0, parts)
        n_bound = np.count_nonzero(passes(rl, spec_rl_db - _BOUND_SLACK_DB), axis=0)
        median_bound = np.median(rl, axis=0) + _BOUND_SLACK_DB
        top = alive[_best_index(n_bound, median_bound)]
        exact = _lot_worst_rl(topology, v1[[top]], v2[[top]], lot.freq_hz, lot.z_load, lot.z0, parts)
        key = (np.count_nonzero(passes(exact, spec_rl_db)), float(np.median(exact)))
        best_key = key if best_key is None else max(best_key, key)
        keep = (n_bound > best_key[0]) | ((n_bound == best_key[0]) & (median_bound >= best_key[1]))
        alive = alive[keep]
    rl = _lot_worst_rl(topology, v1[alive], v2[alive], lot.freq_hz, lot.z_load, lot.z0, parts)
    best = _best_index(np.count_nonzero(passes(rl, spec_rl_db), axis=0), np.median(rl, axis=0))
    return int(alive[best]), rl[:, best]


# ---------------------------------------------------------------------------------------
# Candidate values: standard values near the per-unit optima

def _seed_solutions(lot: LotData, parts: PartLibrary, n_units: int) -> list[list[Solution]]:
    """Continuous (ideal-series) band optima of up to ``n_units`` evenly spread units and of
    the lot's mean reflection (the "typical unit"), with the library's part models."""
    picks = np.unique(np.linspace(0, lot.n_units - 1, min(n_units, lot.n_units)).round().astype(int))
    gamma_mean = np.mean(reflection(lot.z_load, lot.z0), axis=0)
    loads = [(lot.unit_ids[i], lot.z_load[i]) for i in picks]
    loads.append(("lot mean", lot.z0 * (1 + gamma_mean) / (1 - gamma_mean)))
    return [match_band(lot.freq_hz, z, lot.band_hz, lot.z0, series="ideal", parts=parts, where=uid)
            for uid, z in loads]


def _candidate_axis(kind: str, optima: np.ndarray, series: str, parts: PartLibrary,
                    n: int) -> np.ndarray:
    """Sorted standard values near each optimum (nearest plus ``n`` below and above),
    inside the library's range; the optima themselves for the ideal series."""
    lo, hi = parts.ranges[kind]
    if series == "ideal":
        return np.unique(np.clip(optima, lo, hi))
    near = [np.append(neighbours(v, series, n), nearest_standard(v, series)) for v in optima]
    values = np.unique(np.concatenate(near))
    values = values[(values >= lo * (1 - 1e-9)) & (values <= hi * (1 + 1e-9))]
    if values.size:
        return values
    available = standard_values(series, lo, hi)
    if not available.size:
        raise MatchError(f"the part library has no {series} {kind} in its range", where=parts.path)
    return np.unique(nearest_standard(np.clip(optima, available[0], available[-1]), series))


def _candidate_grid(topology: Topology, solutions: Sequence[Sequence[Solution]], series: str,
                    parts: PartLibrary, n: int) -> tuple[np.ndarray, np.ndarray] | None:
    """Flattened (v1, v2) grid for ``topology``, ordered by v1 then v2; None without optima."""
    optima = np.array([[e.value for e in s.elements] for unit in solutions for s in unit
                       if s.topology == topology.name and len(s.elements) == 2])
    if optima.size == 0:
        return None
    axis1, axis2 = (_candidate_axis(kind, optima[:, i], series, parts, n)
                    for i, kind in enumerate(topology.kinds))
    return np.repeat(axis1, axis2.size), np.tile(axis2, axis1.size)


# ---------------------------------------------------------------------------------------
# The shared network

@dataclass(frozen=True)
class TopologyBest:
    """The best network of one topology for the lot (a row of the report)."""

    topology: str
    elements: tuple[Element, ...]
    n_pass: int
    yield_fraction: float
    median_worst_rl_db: float
    n_candidates: int

    def as_dict(self) -> dict:
        return {"topology": self.topology, "elements": [e.as_dict() for e in self.elements],
                "n_pass": self.n_pass, "yield_fraction": self.yield_fraction,
                "median_worst_rl_db": self.median_worst_rl_db, "n_candidates": self.n_candidates}


@dataclass(frozen=True, eq=False)
class SharedResult:
    """One standard-valued network for the whole lot, and how the lot does with it.

    worst_rl_db[i] is unit ``unit_ids[i]``'s worst in-band return loss (dB) with the
    network: the numbers ``yield_fraction`` was computed from (:func:`yield_at_spec`).
    ``per_topology`` holds each topology's best, best first.
    """

    elements: tuple[Element, ...]
    topology: str
    spec_rl_db: float
    series: str
    n_units: int
    n_pass: int
    yield_fraction: float
    median_worst_rl_db: float
    unit_ids: tuple[str, ...]
    worst_rl_db: np.ndarray
    failing_unit_ids: tuple[str, ...]
    per_topology: tuple[TopologyBest, ...]
    band_hz: tuple[float, float]
    n_points: int

    def as_dict(self) -> dict:
        """JSON-ready: the network, its yield, the per-unit worst RL, the topology table."""
        return {"topology": self.topology, "elements": [e.as_dict() for e in self.elements],
                "spec_rl_db": self.spec_rl_db, "series": self.series,
                "band_hz": list(self.band_hz), "n_points": self.n_points,
                "n_units": self.n_units, "n_pass": self.n_pass,
                "yield_fraction": self.yield_fraction,
                "median_worst_rl_db": self.median_worst_rl_db,
                "failing_unit_ids": list(self.failing_unit_ids),
                "unit_ids": list(self.unit_ids),
                "worst_rl_db": [float(x) for x in self.worst_rl_db],
                "per_topology": [t.as_dict() for t in self.per_topology]}


def _elements(topology: Topology, values, parts: PartLibrary) -> tuple[Element, ...]:
    return tuple(Element(p, k, float(v), parts.model_for(k, float(v)))
                 for p, k, v in zip(topology.positions, topology.kinds, values))


def shared_network(lot: LotData, spec_rl_db: float, series: str = "E24",
                   parts: PartLibrary | None = None,
                   per_unit_solutions: Sequence[Sequence[Solution]] | None = None,
                   neighbours_n: int = 2, *, optima_units: int = OPTIMA_UNITS) -> SharedResult:
    """The standard-valued network that passes the most units of ``lot``.

    spec_rl_db         : a unit passes when its worst in-band RL is >= this (dB).
    series             : E-series of the candidate values ("ideal": the optima themselves).
    parts              : library giving value ranges and part models (None: ideal parts).
    per_unit_solutions : band solutions (e.g. from :func:`pipeline.match.match_band`) whose
                         two-part networks say where the optima are; None: computed with
                         ideal (continuous) values for ``optima_units`` units spread over
                         the lot plus the lot's mean reflection.
    neighbours_n       : standard values tried below and above each optimum.

    For each of the eight two-part topologies the candidates are the full grid of the
    standard values near the optima of that topology (source-side values x load-side
    values), each scored on every unit. The winner has the most passing units; ties go to
    the larger median worst RL, then to the earlier topology of
    :data:`pipeline.networks.TOPOLOGIES` and the smaller values.
    """
    series = check_series(series)
    parts = parts or ideal_library()
    if per_unit_solutions is None:
        per_unit_solutions = _seed_solutions(lot, parts, optima_units)
    rows = []
    for order, topology in enumerate(TOPOLOGIES):
        grid = _candidate_grid(topology, per_unit_solutions, series, parts, neighbours_n)
        if grid is None:
            continue
        v1, v2 = grid
        best, worst = _search_grid(topology, v1, v2, lot, spec_rl_db, parts)
        n_pass = int(np.count_nonzero(passes(worst, spec_rl_db)))
        row = TopologyBest(topology.name, _elements(topology, (v1[best], v2[best]), parts), n_pass,
                           yield_at_spec(worst, spec_rl_db), float(np.median(worst)), v1.size)
        rows.append((-n_pass, -row.median_worst_rl_db, order, row, worst))
    if not rows:
        raise MatchError("no two-part network improves any unit of the lot: nothing to share")
    rows.sort(key=lambda r: r[:3])
    winner, worst = rows[0][3], rows[0][4]
    failing = tuple(u for u, ok in zip(lot.unit_ids, passes(worst, spec_rl_db)) if not ok)
    return SharedResult(elements=winner.elements, topology=winner.topology,
                        spec_rl_db=float(spec_rl_db), series=series, n_units=lot.n_units,
                        n_pass=winner.n_pass, yield_fraction=winner.yield_fraction,
                        median_worst_rl_db=winner.median_worst_rl_db, unit_ids=lot.unit_ids,
                        worst_rl_db=worst, failing_unit_ids=failing,
                        per_topology=tuple(r[3] for r in rows), band_hz=lot.band_hz,
                        n_points=lot.freq_hz.size)


# ---------------------------------------------------------------------------------------
# Tolerance Monte Carlo

@dataclass(frozen=True, eq=False)
class ToleranceResult:
    """Predicted production yield of a network whose parts vary within tolerance.

    ``yield_fraction`` = n_pass / n_trials; [ci_low, ci_high] is the Wilson score interval
    at ``confidence``. ``tolerance`` lists each element's +- deviation (H or F) in the
    order of the elements. ``trial_unit_index``, ``trial_values`` (N, elements; H or F)
    and ``trial_worst_rl_db`` are each trial's drawn unit, drawn part values and worst
    in-band RL (dB): the numbers the yield came from.
    """

    n_trials: int
    seed: int
    distribution: str
    confidence: float
    spec_rl_db: float
    n_pass: int
    yield_fraction: float
    ci_low: float
    ci_high: float
    tolerance: tuple[float, ...]
    trial_unit_index: np.ndarray = field(repr=False)
    trial_values: np.ndarray = field(repr=False)
    trial_worst_rl_db: np.ndarray = field(repr=False)

    def as_dict(self) -> dict:
        return {"n_trials": self.n_trials, "seed": self.seed, "distribution": self.distribution,
                "confidence": self.confidence, "ci_method": "wilson",
                "spec_rl_db": self.spec_rl_db, "n_pass": self.n_pass,
                "yield_fraction": self.yield_fraction, "ci_low": self.ci_low,
                "ci_high": self.ci_high, "tolerance": list(self.tolerance),
                "median_worst_rl_db": float(np.median(self.trial_worst_rl_db))}


def draw_deviations(rng: np.random.Generator, distribution: str, size) -> np.ndarray:
    """Part-value deviations as fractions of the tolerance, in [-1, 1].

    ``"uniform"``: uniform within the tolerance, i.e. the tolerance read as hard bounds
    (common practice for a "+-5 %" part with no distribution given). ``"normal-3sigma"``:
    normal with the tolerance at 3 sigma, truncated there (common practice for a process
    centred on nominal).
    """
    if distribution == "uniform":
        return rng.uniform(-1.0, 1.0, size)
    if distribution == "normal-3sigma":
        return stats.truncnorm.rvs(-3.0, 3.0, scale=1 / 3, size=size, random_state=rng)
    raise ValueError(f"distribution must be one of {DISTRIBUTIONS}, not {distribution!r}")


def _trial_worst_rl(elements: tuple[Element, ...], values: np.ndarray, freq_hz: np.ndarray,
                    z_load: np.ndarray, z0: float) -> np.ndarray:
    """(N,) worst RL per trial: values (N, E) of the elements in front of z_load (N, F).

    A drawn part keeps its nominal part's parasitic (the capacitance across an inductor,
    the inductance in series with a capacitor: properties of the package, not of the
    value), so its self-resonance moves as ``srf * sqrt(nominal / drawn)``; its Q and ESR
    stay. For library parts this is the library's own model at the drawn value.
    """
    ladder = []
    for i, e in enumerate(elements):
        drawn = values[:, i, np.newaxis]
        srf = None if e.model.srf_hz is None else e.model.srf_hz * np.sqrt(e.value / drawn)
        ladder.append((e.position, part_impedance(e.kind, drawn, freq_hz, q=e.model.q,
                                                  q_ref_hz=e.model.q_ref_hz,
                                                  esr_ohm=e.model.esr_ohm, srf_hz=srf)))
    gamma = gamma_in(ladder, z_load, z0) * np.ones(z_load.shape)
    return metrics.return_loss_db(np.max(np.abs(gamma), axis=-1))


def tolerance_yield(lot: LotData, elements: Sequence[Element], spec_rl_db: float,
                    parts: PartLibrary | None = None, n_trials: int = 2000, seed: int = 0,
                    distribution: str = "uniform", confidence: float = 0.95) -> ToleranceResult:
    """Monte Carlo production yield of ``elements`` on units like those of ``lot``.

    Each trial draws a unit from the lot (uniformly, with replacement: a bootstrap over
    units) and a value for every part, ``nominal + d * tolerance`` with ``d`` from
    :func:`draw_deviations` and the tolerance from ``parts.tolerance_for`` (relative, or
    absolute for small values; ``parts=None``: configs/parts/ideal.toml's tolerances). A
    drawn value is floored at 0.1 % of nominal to stay physical, and keeps its nominal
    part's parasitics (see :func:`_trial_worst_rl`). The unit passes when its worst
    in-band RL with the drawn parts is ``>= spec_rl_db`` (:func:`passes`). The interval
    is Wilson's score interval (E. B. Wilson, J. Am. Stat. Assoc. 22:209-212, 1927; from memory), from
    ``scipy.stats.binomtest(...).proportion_ci(method="wilson")``.

    The same ``seed`` gives the same numbers (one numpy Generator: every trial's unit is
    drawn first, then every trial's deviations).
    """
    if distribution not in DISTRIBUTIONS:
        raise ValueError(f"distribution must be one of {DISTRIBUTIONS}, not {distribution!r}")
    if n_trials < 1:
        raise ValueError(f"n_trials must be at least 1, not {n_trials}")
    parts = parts or ideal_library()
    elements = tuple(elements)
    nominal = np.array([e.value for e in elements], dtype=float)
    tolerance = np.array([float(parts.tolerance_for(e.kind, e.value)) for e in elements])
    rng = np.random.default_rng(seed)
    unit_index = rng.integers(0, lot.n_units, n_trials)
    deviations = draw_deviations(rng, distribution, (n_trials, len(elements)))
    values = np.maximum(nominal + deviations * tolerance, 1e-3 * nominal)
    worst = np.empty(n_trials)
    per_call = max(1, CHUNK_ELEMENTS // lot.freq_hz.size)
    for a in range(0, n_trials, per_call):
        b = a + per_call
        worst[a:b] = _trial_worst_rl(elements, values[a:b], lot.freq_hz, lot.z_load[unit_index[a:b]],
                                     lot.z0)
    n_pass = int(np.count_nonzero(passes(worst, spec_rl_db)))
    ci = stats.binomtest(n_pass, n_trials).proportion_ci(confidence_level=confidence, method="wilson")
    return ToleranceResult(n_trials=n_trials, seed=seed, distribution=distribution,
                           confidence=confidence, spec_rl_db=float(spec_rl_db), n_pass=n_pass,
                           yield_fraction=yield_at_spec(worst, spec_rl_db), ci_low=float(ci.low),
                           ci_high=float(ci.high), tolerance=tuple(float(t) for t in tolerance),
                           trial_unit_index=unit_index, trial_values=values,
                           trial_worst_rl_db=worst)
