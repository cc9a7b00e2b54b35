"""The report's pictures: matplotlib figures (Agg) rendered to PNG, embedded as data URIs.

Lot figures, each a function of plain arrays (no store, no files):

* :func:`rl_histogram`   worst in-band return loss per unit: as measured, with the lot's
  shared network, and (outline) with each unit's own network; the spec as a line.
* :func:`rl_curves`      return loss over the sweep of every unit, as measured and with the
  shared network, band shaded, failing units in red (one ``LineCollection`` per group,
  so thousands of units draw in well under a second).
* :func:`lot_smith`      the in-band S11 of every unit on one Smith chart, with and without
  the shared network, and the spec circle.
* :func:`headroom_figure` how Q and the matching headroom (Bode–Fano bound minus the
  achieved return loss) spread across the lot.

One unit: :func:`unit_figure` (many: :func:`unit_figures`, in worker processes), the
two-panel match figure of :mod:`pipeline.plots` (return loss with the band shaded and the
Bode–Fano bound; Smith chart with the load, the path of each part along its
constant-resistance or constant-conductance circle and the matched point), plus the
shared network's curve. The Smith chart grid, spec circle, match path and
VSWR axis all come from :mod:`pipeline.plots`.

Conventions as everywhere: Gamma is S11 at the real z0, return loss positive dB, Hz inside.
Text that comes from input files (unit names) is drawn as plain text, never as maths.
"""

from __future__ import annotations

import base64
import io
import os
from concurrent.futures import ProcessPoolExecutor
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Callable, Iterator, Sequence

import numpy as np

from pipeline import metrics
from pipeline.elements import Element
from pipeline.plots import (AFTER, BAND_FILL, BEFORE, INK, MUTED, SPEC, draw_smith_grid,
                            draw_spec_circle, draw_vswr_axis, freq_scale, match_figure)

DPI = 110
FAIL = "#c22f4b"                 # a unit failing the spec with the shared network
OWN = "#43505e"                  # outline: each unit with its own network
RL_TOP_DB = 40.0                 # return loss above this is drawn at the top of the chart


@dataclass(frozen=True)
class Picture:
    """A rendered figure: a ``data:image/png;base64,...`` URI and its size in pixels."""

    uri: str
    width: int
    height: int


def _load_matplotlib():
    """Import matplotlib with the Agg backend (lazily: the command line starts faster)."""
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.backends import backend_agg  # noqa: F401
    from matplotlib.figure import Figure

    return Figure


def _figure(size_in: tuple[float, float]):
    return _load_matplotlib()(figsize=size_in, dpi=DPI, facecolor="white")


def to_picture(fig) -> Picture:
    """Render ``fig`` (drawn once, Agg) to a 256-colour PNG in memory; nothing touches the disk.

    Line art on white needs no more than 256 colours (Pillow's fast octree quantiser: at
    most about 6 % error on a colour channel, and only in anti-aliased edges); the file is
    about a third of a true-colour PNG, and encoding it costs less than ``savefig`` would
    (which draws the figure a second time).
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from PIL import Image

    canvas = FigureCanvasAgg(fig)
    fig.set_dpi(DPI)
    canvas.draw()
    rgb = Image.frombuffer("RGBA", canvas.get_width_height(), canvas.buffer_rgba()).convert("RGB")
    buffer = io.BytesIO()
    rgb.quantize(colors=256, method=Image.Quantize.FASTOCTREE).save(buffer, format="png")
    encoded = base64.b64encode(buffer.getvalue()).decode("ascii")
    return Picture(f"data:image/png;base64,{encoded}", rgb.width, rgb.height)


def _style(ax) -> None:
    """The house style of a plain chart: light grid, no top/right frame, ink-coloured text."""
    ax.grid(True, color="#e6eaee", lw=0.8)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color("#b9c2cb")
    ax.tick_params(colors=INK, labelsize=9)


def _alpha(n_lines: int) -> float:
    """Line opacity that keeps a bundle of ``n_lines`` readable: 0.35 for 60, 0.06 for 2000."""
    return float(np.clip(2.8 / np.sqrt(max(n_lines, 1)), 0.05, 0.6))


def _segments(xs: Sequence[np.ndarray], ys: Sequence[np.ndarray]):
    """Polylines for a LineCollection: one (U, N, 2) array when all units share N points."""
    if xs and all(len(x) == len(xs[0]) for x in xs):
        return np.stack([np.asarray(xs), np.asarray(ys)], axis=-1)
    return [np.column_stack((x, y)) for x, y in zip(xs, ys)]


def _proxy(colour: str, label: str, **style):
    from matplotlib.lines import Line2D

    return Line2D([], [], color=colour, label=label, **style)


# --------------------------------------------------------------------------- histogram

def _bin_edges(values: np.ndarray, spec_rl_db: float) -> np.ndarray:
    lo = np.floor(min(np.min(values), spec_rl_db) - 0.5)
    hi = np.ceil(min(max(np.max(values), spec_rl_db) + 0.5, RL_TOP_DB))
    width = 0.5 if hi - lo <= 25 else 1.0
    return np.arange(lo, hi + width, width)


def rl_histogram(before_db: np.ndarray, shared_db: np.ndarray | None, own_db: np.ndarray,
                 spec_rl_db: float) -> Picture:
    """Histogram of each unit's worst in-band return loss (dB).

    before_db : as measured (after de-embedding); shared_db : with the lot's shared network
    (None when the lot has none); own_db : with each unit's own network (outline).
    Values above :data:`RL_TOP_DB` count in the last bin.
    """
    fig = _figure((6.2, 3.9))
    ax = fig.add_axes((0.1, 0.16, 0.86, 0.72))
    groups = [before_db, own_db] + ([shared_db] if shared_db is not None else [])
    edges = _bin_edges(np.concatenate(groups), spec_rl_db)
    clip = lambda v: np.clip(v, edges[0], edges[-1] - 1e-9)      # noqa: E731
    ax.axvspan(spec_rl_db, edges[-1], color=BAND_FILL, lw=0, zorder=0)
    ax.hist(clip(before_db), edges, color=BEFORE, alpha=0.75, label="as measured")
    if shared_db is not None:
        ax.hist(clip(shared_db), edges, color=AFTER, alpha=0.75, label="with the shared network")
    ax.hist(clip(own_db), edges, histtype="step", color=OWN, lw=1.3,
            label="each with its own network")
    ax.axvline(spec_rl_db, color=INK, lw=1.0, ls=":")
    ax.text(spec_rl_db, 1.01, f" spec {spec_rl_db:g} dB  → pass", transform=ax.get_xaxis_transform(),
            fontsize=8.5, color=INK, ha="left", va="bottom")
    ax.set_xlim(edges[0], edges[-1])
    ax.set_xlabel("Worst in-band return loss (dB)", color=INK)
    ax.set_ylabel("Units", color=INK)
    _style(ax)
    ax.legend(loc="upper left", bbox_to_anchor=(0.0, 1.0), frameon=False, fontsize=8.5)
    return to_picture(fig)


# --------------------------------------------------------------------------- curves

def _shade_band(ax, band_hz, scale: float) -> None:
    lo, hi = band_hz
    if hi > lo:
        ax.axvspan(lo / scale, hi / scale, color=BAND_FILL, lw=0, zorder=0)
    else:
        ax.axvline(lo / scale, color=BAND_FILL, lw=6, zorder=0)


def _bundle(ax, xs, ys, pick: np.ndarray, colour: str, width: float, alpha: float,
            zorder: int = 2) -> None:
    """The picked units' curves (x, y per unit) as one LineCollection."""
    from matplotlib.collections import LineCollection

    if pick.any():
        ax.add_collection(LineCollection(_segments([x for x, k in zip(xs, pick) if k],
                                                   [y for y, k in zip(ys, pick) if k]),
                                         colors=colour, linewidths=width, alpha=alpha, zorder=zorder))


def rl_curves(freqs: Sequence[np.ndarray], before: Sequence[np.ndarray],
              after: Sequence[np.ndarray], failing: np.ndarray, band_hz: tuple[float, float],
              spec_rl_db: float, after_label: str = "with the shared network") -> Picture:
    """Return loss over the sweep of every unit: as measured (left), with a network (right).

    freqs, before, after : per unit, (N_u,) Hz and Gamma without / with the network.
    failing              : (U,) bool, units that miss the spec with the network (drawn red,
                           on top, in the right-hand panel).
    Return loss above :data:`RL_TOP_DB` is drawn at the top edge.
    """
    fig = _figure((11.0, 4.2))
    scale, unit = freq_scale(np.asarray(freqs[0]))
    xs = [np.asarray(f) / scale for f in freqs]
    failing = np.asarray(failing, dtype=bool)
    alpha = _alpha(len(freqs))
    panels = ((0.06, "As measured (de-embedded)", before, BEFORE, np.zeros_like(failing)),
              (0.53, f"{after_label[0].upper()}{after_label[1:]}", after, AFTER, failing))
    for left, title, gammas, colour, red in panels:
        ax = fig.add_axes((left, 0.14, 0.40, 0.74))
        rls = [np.minimum(metrics.return_loss_db(g), RL_TOP_DB) for g in gammas]
        _shade_band(ax, band_hz, scale)
        _bundle(ax, xs, rls, ~red, colour, 0.9, alpha)
        _bundle(ax, xs, rls, red, FAIL, 1.0, max(alpha, 0.4), zorder=3)
        ax.axhline(spec_rl_db, color=INK, lw=1.0, ls=":")
        ax.set_xlim(min(x[0] for x in xs), max(x[-1] for x in xs))
        ax.set_ylim(0, RL_TOP_DB)
        ax.set_title(title, loc="left", fontsize=10.5, color=INK, fontweight="bold")
        ax.set_xlabel(f"Frequency ({unit})", color=INK)
        if left < 0.5:
            ax.set_ylabel("Return loss (dB)  — higher is better", color=INK)
        _style(ax)
        draw_vswr_axis(ax, RL_TOP_DB)
        handles = [_proxy(colour, f"{int((~red).sum())} units", lw=1.5)]
        if red.any():
            handles.append(_proxy(FAIL, f"{int(red.sum())} failing", lw=1.5))
        handles.append(_proxy(INK, f"spec {spec_rl_db:g} dB", lw=1.0, ls=":"))
        ax.legend(handles=handles, loc="upper right", frameon=False, fontsize=8.5)
    return to_picture(fig)


# --------------------------------------------------------------------------- Smith chart

def lot_smith(before: Sequence[np.ndarray], after: Sequence[np.ndarray], failing: np.ndarray,
              spec_rl_db: float, after_label: str = "with the shared network") -> Picture:
    """The in-band S11 of every unit on one Smith chart, without and with a network.

    before, after : per unit, the in-band Gamma without / with the network.
    failing       : (U,) bool, units that miss the spec with the network (red, on top).
    """
    fig = _figure((5.6, 6.0))
    ax = fig.add_axes((0.03, 0.13, 0.94, 0.83))
    draw_smith_grid(ax)
    draw_spec_circle(ax, spec_rl_db)
    failing = np.asarray(failing, dtype=bool)
    alpha = _alpha(len(before))
    _bundle(ax, [g.real for g in before], [g.imag for g in before], np.ones_like(failing),
            BEFORE, 1.2, alpha, zorder=3)
    x_after, y_after = [g.real for g in after], [g.imag for g in after]
    _bundle(ax, x_after, y_after, ~failing, AFTER, 1.2, alpha, zorder=4)
    _bundle(ax, x_after, y_after, failing, FAIL, 1.0, max(alpha, 0.35), zorder=5)
    handles = [_proxy(BEFORE, "as measured", lw=2), _proxy(AFTER, after_label, lw=2)]
    if failing.any():
        handles.append(_proxy(FAIL, f"failing {after_label}", lw=2))
    handles.append(_proxy(SPEC, f"|Γ| at RL {spec_rl_db:g} dB", lw=1, ls=":"))
    ax.legend(handles=handles, loc="upper center", bbox_to_anchor=(0.5, 0.0), ncol=2,
              frameon=False, fontsize=8.5)
    return to_picture(fig)


# --------------------------------------------------------------------------- headroom

def headroom_figure(q: np.ndarray, headroom_db: np.ndarray) -> Picture | None:
    """Histograms of the Q estimate and of the headroom (bound minus achieved, dB) per unit.

    NaN (no estimate) is left out; None when neither has a finite value.
    """
    q = np.asarray(q, dtype=float)
    gap = np.asarray(headroom_db, dtype=float)
    q, gap = q[np.isfinite(q)], gap[np.isfinite(gap)]
    if q.size == 0 and gap.size == 0:
        return None
    fig = _figure((11.0, 3.3))
    for left, values, title, xlabel, colour in (
            (0.06, q, "Q of the load at the band centre", "Q (estimate from the impedance)", MUTED),
            (0.55, gap, "Headroom: Bode–Fano bound minus achieved", "Headroom (dB)", AFTER)):
        ax = fig.add_axes((left, 0.19, 0.41, 0.68))
        if values.size:
            ax.hist(values, bins=min(40, max(8, int(np.sqrt(values.size)) * 2)), color=colour,
                    alpha=0.85)
            median = float(np.median(values))
            ax.axvline(median, color=INK, lw=1.0, ls="--")
            ax.text(median, 1.01, f" median {median:.3g}", transform=ax.get_xaxis_transform(),
                    fontsize=8.5, color=INK, ha="left", va="bottom")
        ax.set_title(title, loc="left", fontsize=10.5, color=INK, fontweight="bold", pad=14)
        ax.set_xlabel(xlabel, color=INK)
        ax.set_ylabel("Units", color=INK)
        _style(ax)
    return to_picture(fig)


# --------------------------------------------------------------------------- one unit

@dataclass(frozen=True, eq=False)
class UnitFigure:
    """What the figure of one unit shows (plain arrays: cheap to send to a worker process).

    freq_hz, s11_before, s11_after : (N,) Hz and Gamma of the load and with its own network.
    elements    : the unit's own network, source -> load.
    rl_bound_db : its Bode–Fano bound (dB), or None.
    shared_s11  : (N,) Gamma with the lot's shared network, or None.
    """

    freq_hz: np.ndarray
    s11_before: np.ndarray
    s11_after: np.ndarray
    band_hz: tuple[float, float]
    z0: float
    elements: tuple[Element, ...]
    title: str
    spec_rl_db: float | None
    rl_bound_db: float | None
    shared_s11: np.ndarray | None = None


def unit_figure(unit: UnitFigure) -> Picture:
    """One unit: :func:`pipeline.plots.match_figure` with its own network, the Bode–Fano bound,
    and (when given) the return loss with the lot's shared network as a dashed line."""
    others = [("with the shared network", unit.shared_s11)] if unit.shared_s11 is not None else []
    fig = match_figure(unit.freq_hz, unit.s11_before, unit.s11_after, unit.band_hz, unit.z0,
                       unit.elements, title=unit.title, rl_bound_db=unit.rl_bound_db,
                       spec_rl_db=unit.spec_rl_db, others=others)
    return to_picture(fig)


@contextmanager
def unit_figures(units: Sequence[UnitFigure], workers: int | None = None
                 ) -> Iterator[Callable[[], list[Picture]]]:
    """Render unit figures in the background while the caller draws something else.

    Use as ``with unit_figures(units, workers) as collect: ...; pictures = collect()``.
    A figure costs a few tenths of a second (mostly text rendering), so a lot report's
    unit figures go to a process pool of ``workers`` (default: all cores); with one
    worker, or a single figure, they are drawn in this process when collected.
    """
    n = min(workers or os.cpu_count() or 1, len(units))
    if n <= 1:
        yield lambda: [unit_figure(u) for u in units]
        return
    _load_matplotlib()               # imported once here, not in every (forked) worker
    with ProcessPoolExecutor(max_workers=n) as pool:
        futures = [pool.submit(unit_figure, u) for u in units]
        yield lambda: [f.result() for f in futures]

