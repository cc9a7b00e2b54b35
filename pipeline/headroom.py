"""Matching headroom: how far a band match is from what any lossless network could reach.

Two published results, combined:

* **Antenna Q from the impedance** (A. D. Yaghjian and S. R. Best, "Impedance, bandwidth,
  and Q of antennas", IEEE Trans. Antennas Propag. 53(4):1298-1324, 2005). The load,
  tuned to resonance at w by a series L or C, has

      Q_Z(w) = (w / 2R) * sqrt(R'(w)**2 + (X'(w) + |X(w)|/w)**2)

  with Z = R + jX in ohm and ' the derivative with respect to w = 2*pi*f (rad/s).

* **The Bode-Fano limit** (H. W. Bode 1945; R. M. Fano, J. Franklin Inst. 249, 1950), in
  its antenna form for a single-resonance (series or parallel RLC) load of quality factor
  Q: over a band of fractional width FBW, no lossless passive network of any order can
  hold |Gamma| below Gamma_max everywhere in band unless FBW * ln(1/Gamma_max) <= pi / Q.
  Hence the best uniform in-band reflection and return loss

      Gamma_min = exp(-pi / (Q * FBW)),  RL_bound = 20*log10(e) * pi / (Q * FBW)  dB,

  and, at a spec Gamma_spec, the widest reachable band FBW_max = pi / (Q ln(1/Gamma_spec)).

**Which Q, which centre.** FBW = (f_hi - f_lo) / f_c with the geometric centre
f_c = sqrt(f_lo * f_hi), and Q is Q_Z(f_c). For a series RLC this is exact at any position
of its resonance: with y = w/w0 - w0/w the bound is (w_hi - w_lo)/w0 * ln(1/Gamma) <= pi/Q
for w0 the geometric centre, and Q_Z(w0) in the tuned form equals w0 L/R (band above the
resonance) or 1/(w0 R C) (band below it), the tighter of the load's two Bode-Fano integrals
(series L and series C). For a parallel RLC the estimate is exact at resonance and a few
per cent low off it; for a parallel RC of circuit Q a = w R C it is a**2/sqrt(1 + a**2)
(low by 11 % at a = 2, 0.5 % at a = 10). A low Q makes the bound looser, never tighter.
For a load with several resonances in or near the band, or a Q that changes much across
the band, the single-resonance model is only a guide: the result then carries
``estimate_rough`` and says so in its verdict.

**Smoothing.** R and X and their derivatives come from a Savitzky-Golay filter
(:func:`scipy.signal.savgol_filter`: a least-squares cubic over a sliding window of
frequency points, with its analytic derivative). The window adapts to the load: it is
``window_frac`` (default 0.5) of the load's own half-power bandwidth f/Q, taken as the
median of f/Q_Z over the sweep, found by refining from a first pass at 5 % of the span.
A wider window averages more noise; a narrower one follows a sharp (parallel-type)
resonance without flattening it. With 0.5 the bias on an ideal parallel RLC is under 1 %
and -50 dB of noise on S11 moves Q by a few per cent (tests/test_headroom.py). A sweep
that is not evenly spaced is first resampled (cubic spline) onto an even grid of the same
number of points. The load's bandwidth must span several sweep points; the window never
shrinks below 5 points.
"""

from __future__ import annotations

import math
from collections import Counter
from dataclasses import dataclass, replace

import numpy as np
from scipy.interpolate import CubicSpline
from scipy.signal import savgol_filter

from pipeline.errors import MatchError

DB_PER_NEPER = 20 * math.log10(math.e)      # 8.686 dB: RL_dB = DB_PER_NEPER * ln(1/|Gamma|)

POLYORDER = 3                   # cubic local fit: its derivative is exact for cubic R, X
MIN_WINDOW = POLYORDER + 2      # 5 points: the smallest odd window that still smooths
FIRST_PASS_SPAN_FRAC = 0.05     # first-pass window, as a fraction of the sweep's span
MAX_REFINEMENTS = 3             # window refinements after the first pass
UNIFORM_RTOL = 1e-3             # step variation still taken as an evenly spaced sweep

# Verdict thresholds on gap = RL_bound - RL_achieved, dB (see headroom()).
AT_LIMIT_DB = 1.0
SOME_ROOM_DB = 3.0
# When the single-resonance model is only a guide (see the module docstring).
ROUGH_Q_SPREAD = 1.5            # max/min of Q_Z across the band
ROUGH_Q_MIN = 2.0               # below this the narrow-band RLC picture breaks down
# Limits above this read "above 40 dB" in words: a calibrated analyzer's residual
# directivity (typically 40-50 dB) and part tolerances make a better return loss neither
# measurable nor buildable (common practice), so the antenna is not what limits the match.
_FAR_DB = 40.0


# --------------------------------------------------------------------------- Q estimate

def estimate_q(freq_hz, z_ohm, *, window_frac: float = 0.5, window_hz: float | None = None
               ) -> np.ndarray:
    """Yaghjian-Best Q_Z (tuned form) at every sweep point; NaN where R <= 0.

    freq_hz : (N,) strictly rising frequencies, Hz.
    z_ohm   : (N,) complex load impedance at those frequencies, ohm (de-embedded).
    window_frac : smoothing window as a fraction of the load's half-power bandwidth f/Q.
    window_hz   : a fixed smoothing window width in Hz instead (overrides window_frac).
    """
    return _estimate(freq_hz, z_ohm, window_frac, window_hz)[0]


def q_at(freq_hz, z_ohm, f_hz: float, *, window_frac: float = 0.5,
         window_hz: float | None = None) -> float:
    """Q_Z at one frequency inside the sweep (linear between sweep points)."""
    f = np.asarray(freq_hz, dtype=float)
    _check_inside(f, f_hz, f_hz)
    q = estimate_q(f, z_ohm, window_frac=window_frac, window_hz=window_hz)
    return float(np.interp(f_hz, f, q))


def _estimate(freq_hz, z_ohm, window_frac, window_hz):
    """(Q_Z array on the given points, smoothing window width used in Hz) of one load."""
    f = np.asarray(freq_hz, dtype=float)
    z = np.asarray(z_ohm, dtype=complex)
    if f.ndim != 1 or z.shape != f.shape:
        raise ValueError(f"freq_hz and z_ohm differ in shape ({f.shape} vs {z.shape})")
    q, window_hz_used = _estimate_many(f, z[np.newaxis], window_frac, window_hz)
    return q[0], float(window_hz_used[0])


def _estimate_many(f: np.ndarray, z: np.ndarray, window_frac, window_hz):
    """(Q_Z (U, N) on the points ``f`` (N,), smoothing window width used per unit in Hz (U,))
    for U loads ``z`` (U, N) on one grid.

    Every unit goes through the same steps as alone (first pass, refinements until its
    window stops changing); the units sharing a window length are smoothed in one call,
    and a unit coming back to a window it had is not smoothed again.
    """
    if f.size < MIN_WINDOW:
        raise MatchError(f"{f.size} points are too few to estimate Q (need {MIN_WINDOW})")
    if np.any(np.diff(f) <= 0) or f[0] <= 0:
        raise ValueError("freq_hz must be positive and strictly rising")
    if not window_frac > 0 or (window_hz is not None and not window_hz > 0):
        raise ValueError("the smoothing window must be positive")
    grid, z_grid = _even_grid(f, z)
    step = grid[1] - grid[0]
    first = window_hz / step if window_hz is not None else FIRST_PASS_SPAN_FRAC * grid.size
    points = np.full(z.shape[0], _window_points(first, grid.size))
    q = _qz_smoothed(grid, z_grid, int(points[0]))
    known = {(u, int(points[0])): row.copy() for u, row in enumerate(q)}   # (unit, window): Q_Z
    active = np.arange(z.shape[0]) if window_hz is None else np.arange(0)
    for _ in range(MAX_REFINEMENTS):
        refined = _refined_window(grid, q[active], window_frac, step)
        changed = (refined > 0) & (refined != points[active])    # 0: no bandwidth known
        active = active[changed]
        points[active] = refined[changed]
        if not active.size:
            break
        for width in np.unique(points[active]).tolist():
            todo = [u for u in active[points[active] == width].tolist() if (u, width) not in known]
            if todo:
                known.update(zip(((u, width) for u in todo), _qz_smoothed(grid, z_grid[todo], width)))
        q[active] = [known[u, int(width)] for u, width in zip(active, points[active])]
    if grid is not f:
        q = np.stack([np.interp(f, grid, row) for row in q])
    return q, (points - 1) * step


def _refined_window(grid: np.ndarray, q: np.ndarray, window_frac: float, step: float) -> np.ndarray:
    """Per unit (rows of ``q``), the window length in points for ``window_frac`` of the
    load's half-power width f/Q (its median over the sweep); 0 where no Q is known."""
    with np.errstate(divide="ignore", invalid="ignore"):
        bandwidth_hz = grid / q                          # the load's half-power width f/Q
    out = np.zeros(q.shape[0], dtype=int)
    for u, row in enumerate(bandwidth_hz):
        row = row[np.isfinite(row)]
        if row.size:
            out[u] = _window_points(window_frac * np.median(row) / step, grid.size)
    return out


def _qz_smoothed(freq_hz: np.ndarray, z_ohm: np.ndarray, points: int) -> np.ndarray:
    """Q_Z (U, N) from Savitzky-Golay smoothed R, X and dR/dw, dX/dw over ``points``
    samples, for loads ``z_ohm`` (U, N) on the evenly spaced ``freq_hz`` (N,)."""
    w = 2 * np.pi * freq_hz
    dw = w[1] - w[0]
    units = z_ohm.shape[0]
    parts = np.concatenate([z_ohm.real, z_ohm.imag])        # R rows, then X rows
    smooth = savgol_filter(parts, points, POLYORDER, delta=dw, mode="interp", axis=-1)
    slope = savgol_filter(parts, points, POLYORDER, deriv=1, delta=dw, mode="interp", axis=-1)
    r, x, dr, dx = smooth[:units], smooth[units:], slope[:units], slope[units:]
    with np.errstate(divide="ignore", invalid="ignore"):
        q = w / (2 * r) * np.hypot(dr, dx + np.abs(x) / w)
    return np.where(r > 0, q, np.nan)


def _even_grid(f: np.ndarray, z: np.ndarray):
    """The sweep itself when evenly spaced, else a cubic-spline resampling of the loads
    ``z`` (..., N) onto an even grid of the same number of points."""
    steps = np.diff(f)
    if np.ptp(steps) <= UNIFORM_RTOL * steps.mean():
        return f, z
    grid = np.linspace(f[0], f[-1], f.size)
    return grid, CubicSpline(f, z, axis=-1)(grid)


def _window_points(width_points: float, n: int) -> int:
    """An odd window length in points, between the minimum and the whole sweep."""
    points = int(round(min(width_points, n))) | 1
    largest = n if n % 2 else n - 1
    return int(min(max(points, MIN_WINDOW), largest))


# --------------------------------------------------------------------------- the bound

@dataclass(frozen=True)
class Bound:
    """The Bode-Fano limit for a load of quality factor ``q`` over ``band_hz``.

    fbw               : (f_hi - f_lo) / center_hz, center_hz = sqrt(f_lo * f_hi).
    gamma_min         : best uniform in-band |Gamma| any lossless network can reach.
    rl_bound_db       : the same as return loss, dB (inf for a single frequency or Q = 0).
    max_fbw_at_spec   : widest fractional band at spec_rl_db (None without a spec).
    max_band_hz_at_spec : that band in Hz, (f_lo, f_hi) geometrically centred on center_hz.
    """

    q: float
    band_hz: tuple[float, float]
    center_hz: float
    fbw: float
    gamma_min: float
    rl_bound_db: float
    spec_rl_db: float | None = None
    max_fbw_at_spec: float | None = None
    max_band_hz_at_spec: tuple[float, float] | None = None


def bode_fano_bound(q: float, band_hz: tuple[float, float], spec_rl_db: float | None = None
                    ) -> Bound:
    """The Bode-Fano bound (antenna form) over ``band_hz`` for a load of Q ``q``.

    ``q`` NaN (no estimate) gives NaN limits; ``q`` = 0 or a single-frequency band gives
    gamma_min = 0 (no limit). ``spec_rl_db`` (positive dB) adds the widest band at the spec.
    """
    f_lo, f_hi = (float(v) for v in band_hz)
    if not 0 < f_lo <= f_hi:
        raise MatchError(f"band {f_lo:g}..{f_hi:g} Hz must have 0 < low <= high")
    if q < 0:
        raise ValueError(f"Q must not be negative, got {q}")
    center = math.sqrt(f_lo * f_hi)
    fbw = (f_hi - f_lo) / center
    q = float(q)
    if q * fbw == 0:                                 # NaN falls through to NaN limits
        nepers = math.inf
    else:
        nepers = math.pi / (q * fbw)                 # ln(1/Gamma_min)
    bound = Bound(q=q, band_hz=(f_lo, f_hi), center_hz=center, fbw=fbw,
                  gamma_min=math.exp(-nepers), rl_bound_db=DB_PER_NEPER * nepers)
    if spec_rl_db is None:
        return bound
    if not spec_rl_db > 0:
        raise MatchError(f"spec return loss {spec_rl_db} dB must be positive")
    max_fbw = math.inf if q == 0 else math.pi * DB_PER_NEPER / (q * spec_rl_db)
    return replace(bound, spec_rl_db=float(spec_rl_db), max_fbw_at_spec=max_fbw,
                   max_band_hz_at_spec=_centred_band(center, max_fbw))


def _centred_band(center_hz: float, fbw: float) -> tuple[float, float]:
    """(f_lo, f_hi) with f_hi - f_lo = fbw * center_hz and f_lo * f_hi = center_hz**2."""
    if math.isinf(fbw):
        return (0.0, math.inf)
    root = math.sqrt(1 + fbw ** 2 / 4)
    return (center_hz * (root - fbw / 2), center_hz * (root + fbw / 2))


# --------------------------------------------------------------------------- headroom

@dataclass(frozen=True)
class Headroom:
    """A band match set beside its Bode-Fano limit, with a verdict in plain words.

    gap_db = bound.rl_bound_db - rl_achieved_db (positive: room left). ``verdict_code`` is
    one of: at_limit, some_room, room, too_narrow, beats_estimate, single_frequency,
    no_estimate. ``q_band_range`` is (min, max) of Q_Z across the band when known.
    """

    bound: Bound
    rl_achieved_db: float
    spec_rl_db: float | None
    gap_db: float
    verdict_code: str
    verdict: str
    estimate_rough: bool = False
    q_band_range: tuple[float, float] | None = None
    q_window_hz: float | None = None

    def as_dict(self) -> dict:
        """JSON-ready keys; NaN and infinite values become null."""
        b = self.bound
        band = b.max_band_hz_at_spec
        return {
            "q_estimate": _finite(b.q),
            "q_center_hz": b.center_hz,
            "q_band_min": _finite(self.q_band_range[0]) if self.q_band_range else None,
            "q_band_max": _finite(self.q_band_range[1]) if self.q_band_range else None,
            "q_window_hz": _finite(self.q_window_hz),
            "fbw": b.fbw,
            "rl_achieved_db": _finite(self.rl_achieved_db),
            "rl_bound_db": _finite(b.rl_bound_db),
            "gamma_min": _finite(b.gamma_min),
            "headroom_db": _finite(self.gap_db),
            "spec_rl_db": self.spec_rl_db,
            "max_fbw_at_spec": _finite(b.max_fbw_at_spec),
            "max_band_hz_at_spec": [_finite(band[0]), _finite(band[1])] if band else None,
            "estimate_rough": self.estimate_rough,
            "verdict_code": self.verdict_code,
            "verdict": self.verdict,
        }


def headroom(achieved_rl_db: float, bound: Bound, spec_rl_db: float | None = None, *,
             q_band_range: tuple[float, float] | None = None,
             q_window_hz: float | None = None) -> Headroom:
    """Compare a match's worst in-band return loss with the bound; say what it means.

    Thresholds on the gap (bound minus achieved, dB):

    * <= 1 dB, "at_limit": the bound scales as 1/Q, so the 2-5 % uncertainty of the Q
      estimate is 0.5-1 dB on a typical 15-25 dB bound: a gap this small is within the
      limit's own uncertainty, and more parts will not help much.
    * 1-3 dB, "some_room": real but small; finite-order networks only approach the
      infinite-order limit, so a three- or four-element network may gain a little.
    * > 3 dB, "room": more than three times that uncertainty and a factor of two in
      reflected power (the usual threshold of a worthwhile change, common practice).
    * a bound below the spec, "too_narrow": no lossless network can reach it.
    * gap < -1 dB, "beats_estimate": impossible for a lossless network on a true
      single-resonance load, so the Q estimate does not fit the load (or lossy parts
      trade efficiency for return loss).

    ``spec_rl_db`` None falls back to the bound's spec; a different spec recomputes it.
    """
    if spec_rl_db is None:
        spec_rl_db = bound.spec_rl_db
    elif spec_rl_db != bound.spec_rl_db:
        bound = bode_fano_bound(bound.q, bound.band_hz, spec_rl_db)
    spec_rl_db = None if spec_rl_db is None else float(spec_rl_db)
    achieved = float(achieved_rl_db)
    gap = bound.rl_bound_db - achieved
    rough_reason = _rough_reason(bound.q, q_band_range)
    code, verdict = _verdict(bound, achieved, gap, spec_rl_db)
    if rough_reason and code not in ("no_estimate", "single_frequency"):
        verdict += f" (rough estimate: {rough_reason})"
    return Headroom(bound=bound, rl_achieved_db=achieved, spec_rl_db=spec_rl_db, gap_db=gap,
                    verdict_code=code, verdict=verdict, estimate_rough=bool(rough_reason),
                    q_band_range=q_band_range, q_window_hz=q_window_hz)


def _verdict(bound: Bound, achieved: float, gap: float, spec: float | None) -> tuple[str, str]:
    """(code, sentence) for one comparison; see headroom() for the thresholds."""
    if math.isnan(bound.q):
        return "no_estimate", ("no Q estimate at the band centre (the resistance there is "
                               "not positive): no limit computed")
    if math.isinf(bound.rl_bound_db):
        return "single_frequency", ("single frequency or no reactance slope: a lossless "
                                    "network can match perfectly, the limit applies over a band")
    limit = _db_words(bound.rl_bound_db)
    if gap < -AT_LIMIT_DB:
        return "beats_estimate", (f"the match beats the estimated limit ({limit}) by "
                                  f"{-gap:.1f} dB: the Q estimate does not fit this load "
                                  "(several resonances, far off resonance, or lossy parts)")
    if spec is not None and bound.rl_bound_db < spec:
        lo, hi = bound.max_band_hz_at_spec
        return "too_narrow", (f"the antenna is too narrow-band for this spec over this band: "
                              f"no lossless network can reach {spec:.1f} dB; the limit is "
                              f"{limit} (Q {bound.q:.3g}); at {spec:.1f} dB the widest band is "
                              f"{(hi - lo) / 1e6:.4g} MHz")
    spec_words = _spec_words(achieved, spec)
    if gap <= AT_LIMIT_DB:
        return "at_limit", (f"within 1 dB of the limit ({limit}): more parts will not help "
                            f"much{spec_words}")
    if gap <= SOME_ROOM_DB:
        return "some_room", (f"some room ({gap:.1f} dB below the limit of {limit}): a three- "
                             f"or four-element network may gain a little{spec_words}")
    if spec is None:
        outlook = "a higher-order network could do better"
    elif achieved < spec:
        outlook = f"a higher-order network could reach the {spec:.1f} dB spec"
    else:
        outlook = "the spec is met; a higher-order network could add margin"
    if bound.rl_bound_db > _FAR_DB:
        return "room", (f"far from the limit ({limit}): over this band the antenna is not what "
                        f"limits the match, the two-part network is; {outlook}")
    return "room", f"{gap:.1f} dB from the limit ({limit}): {outlook}"


def _spec_words(achieved: float, spec: float | None) -> str:
    if spec is None:
        return ""
    if achieved >= spec:
        return f"; meets the {spec:.1f} dB spec"
    return f"; misses the {spec:.1f} dB spec by {spec - achieved:.1f} dB"


def _rough_reason(q: float, q_band_range: tuple[float, float] | None) -> str:
    """Why the single-resonance limit is only a guide here, or '' when it is not."""
    if math.isnan(q):
        return ""
    if q < ROUGH_Q_MIN:
        return f"Q {q:.2g} is too low for the single-resonance model"
    if q_band_range:
        q_min, q_max = q_band_range
        if not (q_min > 0 and q_max / q_min <= ROUGH_Q_SPREAD):
            return (f"Q varies from {q_min:.3g} to {q_max:.3g} across the band "
                    "(several resonances, or far from one)")
    return ""


def _db_words(db: float) -> str:
    return f"above {_FAR_DB:.0f} dB" if db > _FAR_DB else f"{db:.1f} dB"


def _finite(value) -> float | None:
    if value is None or not math.isfinite(value):
        return None
    return float(value)


# --------------------------------------------------------------------------- one call

def analyse_band(freq_hz, z_ohm, band_hz: tuple[float, float], achieved_rl_db: float,
                 spec_rl_db: float | None = None, *, window_frac: float = 0.5,
                 window_hz: float | None = None) -> Headroom:
    """Q at the band's geometric centre, the Bode-Fano bound over the band, the verdict.

    freq_hz, z_ohm : the (de-embedded) load impedance over the sweep, Hz and ohm.
    band_hz        : (f_lo, f_hi) inside the sweep, Hz.
    achieved_rl_db : the match's worst in-band return loss, dB.
    window_frac, window_hz : the smoothing window, as in :func:`estimate_q`.
    The one-unit case of :func:`analyse_band_many`.
    """
    f = np.asarray(freq_hz, dtype=float)
    z = np.asarray(z_ohm, dtype=complex)
    if f.ndim != 1 or z.shape != f.shape:
        raise ValueError(f"freq_hz and z_ohm differ in shape ({f.shape} vs {z.shape})")
    return analyse_band_many(f, z[np.newaxis], band_hz, [achieved_rl_db], spec_rl_db,
                             window_frac=window_frac, window_hz=window_hz)[0]


def analyse_band_many(freq_hz, z_units, band_hz: tuple[float, float], achieved_rl_db,
                      spec_rl_db: float | None = None, *, window_frac: float = 0.5,
                      window_hz: float | None = None) -> list[Headroom]:
    """:func:`analyse_band` for U units measured on one frequency grid.

    freq_hz        : (N,) the shared sweep frequencies, Hz.
    z_units        : (U, N) each unit's (de-embedded) load impedance, ohm.
    achieved_rl_db : (U,) each unit's worst in-band return loss after matching, dB.
    Each unit gets its own smoothing window, as alone; the units whose windows have
    the same length are smoothed together in one Savitzky-Golay call.
    """
    f = np.asarray(freq_hz, dtype=float)
    z = np.asarray(z_units, dtype=complex)
    achieved = np.asarray(achieved_rl_db, dtype=float)
    if f.ndim != 1 or z.ndim != 2 or z.shape[1:] != f.shape or achieved.shape != z.shape[:1]:
        raise ValueError(f"freq_hz (N,), z_units (U, N) and achieved_rl_db (U,) do not fit "
                         f"({f.shape}, {z.shape}, {achieved.shape})")
    f_lo, f_hi = (float(v) for v in band_hz)
    _check_inside(f, f_lo, f_hi)
    if not z.shape[0]:
        return []
    q, window_used_hz = _estimate_many(f, z, window_frac, window_hz)
    center = math.sqrt(f_lo * f_hi)
    at = np.stack([np.interp([f_lo, f_hi, center], f, row) for row in q])      # (U, 3)
    q_band = np.concatenate([at[:, :2], q[:, (f > f_lo) & (f < f_hi)]], axis=1)
    q_min, q_max = np.fmin.reduce(q_band, axis=1), np.fmax.reduce(q_band, axis=1)   # NaN: none
    out = []
    for u in range(z.shape[0]):
        q_range = (float(q_min[u]), float(q_max[u])) if np.isfinite(q_band[u]).any() else None
        bound = bode_fano_bound(float(at[u, 2]), (f_lo, f_hi), spec_rl_db)
        out.append(headroom(achieved[u], bound, spec_rl_db, q_band_range=q_range,
                            q_window_hz=float(window_used_hz[u])))
    return out


def _check_inside(f: np.ndarray, f_lo: float, f_hi: float) -> None:
    slack = 1e-9 * f[-1]
    if f_lo < f[0] - slack or f_hi > f[-1] + slack:
        raise MatchError(f"band {f_lo / 1e6:.6g}..{f_hi / 1e6:.6g} MHz lies outside the sweep "
                         f"{f[0] / 1e6:.6g}..{f[-1] / 1e6:.6g} MHz")


# --------------------------------------------------------------------------- per lot

def summarise_lot(headrooms) -> dict:
    """Distribution of Q, the bound and the headroom across a lot's units.

    ``headrooms``: :class:`Headroom` objects or their stored :meth:`Headroom.as_dict` form.
    Returns {"units": n, "q_estimate": stats, "rl_bound_db": stats, "headroom_db": stats,
    "verdicts": {code: count}, "rough_estimates": count}; stats is {"count", "min", "p10",
    "median", "p90", "max"} over the finite values (None when there are none).
    """
    items = [h.as_dict() if isinstance(h, Headroom) else h for h in headrooms]

    def column(key):
        return [np.nan if h.get(key) is None else h[key] for h in items]

    return {
        "units": len(items),
        "q_estimate": _stats(column("q_estimate")),
        "rl_bound_db": _stats(column("rl_bound_db")),
        "headroom_db": _stats(column("headroom_db")),
        "verdicts": dict(Counter(h.get("verdict_code") for h in items)),
        "rough_estimates": sum(bool(h.get("estimate_rough")) for h in items),
    }


def _stats(values) -> dict | None:
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return None
    p10, median, p90 = np.percentile(v, [10, 50, 90])
    return {"count": int(v.size), "min": float(v.min()), "p10": float(p10),
            "median": float(median), "p90": float(p90), "max": float(v.max())}
