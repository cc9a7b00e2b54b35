"""How one unit's match is shown: the network in words, its Smith-chart path, the figure.

* :func:`network_text` spells a ladder out from the source port to the antenna,
  e.g. ``radio ─ shunt 3.3 pF ─ series 12 nH ─ antenna``.
* :func:`match_path` is the path the load takes on the Smith chart as the parts are
  added one by one, starting at the load: a series part moves the point along a circle
  of constant resistance, a shunt part along a circle of constant conductance.
* :func:`match_figure` draws return loss before/after over the sweep (band shaded, worst
  in-band point marked, VSWR on the right-hand axis) beside a Smith chart with the load,
  the path of each part and the matched point; :func:`plot_match` writes it as a PNG.
  matplotlib with the Agg backend (no display needed); the PNG is written to a temporary
  file and renamed into place, so a failed plot leaves nothing half-written.
* The pieces are public for other figures (the lot report): :func:`draw_smith_grid`,
  :func:`draw_spec_circle`, :func:`draw_match_path`, :func:`draw_vswr_axis`,
  :func:`freq_scale`.

Sign conventions as everywhere in matchbay: elements are listed source -> load,
Gamma is S11 at the real reference z0, return loss is positive dB.
"""

from __future__ import annotations

import os
import tempfile
from pathlib import Path
from typing import Sequence

import numpy as np

from pipeline import metrics
from pipeline.elements import Element
from pipeline.networks import reflection
from pipeline.units import format_si

FIG_SIZE_IN = (12.0, 5.6)
DPI = 120
RL_AXIS_TOP_DB = 50.0        # an exact single-frequency match would otherwise read 300 dB

# A calm palette: ink for text, a muted terracotta for the raw load, a deep teal for the
# matched result, sage and violet for series and shunt moves.
INK = "#2b3440"
MUTED = "#7b8794"
BEFORE = "#c0735a"
AFTER = "#2f6f8f"
OTHER = "#b7892a"            # a further "after" trace, e.g. a lot's shared network
SERIES_MOVE = "#5b8c5a"
SHUNT_MOVE = "#8a6fb0"
BAND_FILL = "#e3ecf2"
GRID_Z = "#c4ced8"
GRID_Y = "#e7dcc8"
SPEC = "#9aa5b1"

_UNIT = {"inductor": "H", "capacitor": "F", "resistor": "Ω"}


def element_text(element: Element) -> str:
    """``'shunt 3.3 pF'``: position and value with an SI prefix."""
    return f"{element.position} {format_si(element.value, _UNIT[element.kind])}"


def network_text(elements: Sequence[Element], source: str = "radio", load: str = "antenna") -> str:
    """The ladder from the source port to the load, e.g. ``radio ─ shunt 3.3 pF ─ antenna``."""
    return " ─ ".join([source, *(element_text(e) for e in elements), load])


def match_path(elements: Sequence[Element], z_load: complex, freq_hz: float, z0: float,
               points: int = 64) -> list[np.ndarray]:
    """Gamma along the way as each part is added, at one frequency.

    Parts are applied from the load toward the source (``elements`` is source -> load, so
    the last element comes first). Each part's immittance grows from zero to its value:
    a series part's impedance ``t * Z`` (constant-resistance circle for a lossless part),
    a shunt part's admittance ``t * Y`` (constant-conductance circle), ``t`` from 0 to 1.
    (Sweeping the reactance rather than the part value keeps the path continuous: a
    series capacitor "of value 0" would be an open circuit, not the absence of a part.)

    Returns one array of ``points`` Gamma values per element, in the order applied:
    ``paths[0][0]`` is the load, ``paths[-1][-1]`` the matched input reflection.
    """
    t = np.linspace(0.0, 1.0, points)
    z = complex(z_load)
    paths = []
    for element in reversed(elements):
        z_part = complex(element.impedance(freq_hz))
        if element.position == "series":
            z_along = z + t * z_part
        else:
            z_along = 1 / (1 / z + t / z_part)
        paths.append(reflection(z_along, z0))
        z = complex(z_along[-1])
    return paths


def plot_match(path_png: str | Path, freq_hz, s11_before, s11_after, band_hz: tuple[float, float],
               z0: float, elements: Sequence[Element], *, title: str = "",
               rl_bound_db: float | None = None, rl_bound_label: str = "Bode–Fano bound",
               spec_rl_db: float | None = None) -> Path:
    """Write the two-panel match figure (:func:`match_figure`) to ``path_png``; its path."""
    fig = match_figure(freq_hz, s11_before, s11_after, band_hz, z0, elements, title=title,
                       rl_bound_db=rl_bound_db, rl_bound_label=rl_bound_label,
                       spec_rl_db=spec_rl_db)
    return _save_atomically(fig, Path(path_png))


def match_figure(freq_hz, s11_before, s11_after, band_hz: tuple[float, float], z0: float,
                 elements: Sequence[Element], *, title: str = "",
                 rl_bound_db: float | None = None, rl_bound_label: str = "Bode–Fano bound",
                 spec_rl_db: float | None = None,
                 others: Sequence[tuple[str, np.ndarray]] = ()):
    """The two-panel match figure as a matplotlib ``Figure`` (Agg canvas, nothing shown).

    freq_hz     : (N,) Hz, rising.
    s11_before  : (N,) complex Gamma of the load (after any de-embedding), at ``z0``.
    s11_after   : (N,) complex Gamma at the source port with ``elements`` in place.
    band_hz     : (f_lo, f_hi); f_lo == f_hi for a single-frequency match.
    elements    : the network, source -> load (empty: no network needed).
    rl_bound_db : optional best return loss achievable over the band (dashed when it fits
                  on the chart; its value is listed in the worst-in-band box either way).
    spec_rl_db  : optional pass/fail return loss (drawn dotted).
    others      : further (label, (N,) Gamma) "after" traces, e.g. with a lot's shared
                  network, drawn dashed on both panels.
    The title is drawn as plain text (a ``$`` in a unit name is not maths).
    """
    import matplotlib

    matplotlib.use("Agg")
    from matplotlib.figure import Figure

    freq_hz = np.asarray(freq_hz, dtype=float)
    s11_before = np.asarray(s11_before, dtype=complex)
    s11_after = np.asarray(s11_after, dtype=complex)
    others = [(label, np.asarray(s11, dtype=complex)) for label, s11 in others]
    fig = Figure(figsize=FIG_SIZE_IN, dpi=DPI, facecolor="white")
    ax_rl = fig.add_axes((0.065, 0.12, 0.46, 0.73))
    ax_smith = fig.add_axes((0.575, 0.19, 0.41, 0.70))
    _draw_return_loss(ax_rl, freq_hz, s11_before, s11_after, band_hz, rl_bound_db,
                      rl_bound_label, spec_rl_db, others)
    _draw_smith(ax_smith, freq_hz, s11_before, s11_after, band_hz, z0, elements, spec_rl_db,
                others)
    fig.suptitle(title or "Matching network", x=0.065, ha="left", y=0.965, fontsize=13,
                 color=INK, fontweight="bold", parse_math=False)
    fig.text(0.065, 0.905, f"{network_text(elements)}    (z0 = {z0:g} Ω)", fontsize=10.5,
             color=INK, ha="left")
    return fig


# --- return-loss panel ------------------------------------------------------------------

def freq_scale(freq_hz: np.ndarray) -> tuple[float, str]:
    """(divisor, unit) to show ``freq_hz`` in: GHz from 2 GHz up, else MHz."""
    return (1e9, "GHz") if freq_hz[-1] >= 2e9 else (1e6, "MHz")


def _draw_return_loss(ax, freq_hz, s11_before, s11_after, band_hz, rl_bound_db, rl_bound_label,
                      spec_rl_db, others=()) -> None:
    scale, unit = freq_scale(freq_hz)
    f = freq_hz / scale
    rl_before = metrics.return_loss_db(s11_before)
    rl_after = metrics.return_loss_db(s11_after)
    lo, hi = band_hz
    if hi > lo:
        ax.axvspan(lo / scale, hi / scale, color=BAND_FILL, lw=0, zorder=0)
    else:
        ax.axvline(lo / scale, color=BAND_FILL, lw=6, zorder=0)
    ax.plot(f, rl_before, color=BEFORE, lw=1.6, label="before (load)")
    ax.plot(f, rl_after, color=AFTER, lw=2.0, label="after (with network)")
    for label, s11 in others:
        ax.plot(f, metrics.return_loss_db(s11), color=OTHER, lw=1.5, ls="--", label=label)
    highest = float(np.max(rl_after))
    if rl_bound_db is not None and rl_bound_db + 3 <= RL_AXIS_TOP_DB:
        highest = max(highest, rl_bound_db)           # a bound that fits is always in view
    top = min(RL_AXIS_TOP_DB, max(25.0, 5 * np.ceil((1.3 * highest + 3) / 5)))   # room for the box
    # The spec and the bound are labelled on the chart and in the text box, not in the
    # legend, so the legend stays short enough to sit beside the box.
    if spec_rl_db is not None:
        ax.axhline(spec_rl_db, color=SPEC, lw=1.0, ls=":")
        ax.text(f[-1], spec_rl_db, f"spec {spec_rl_db:g} dB ", color=MUTED, fontsize=8,
                ha="right", va="bottom")
    bound_row = None
    if rl_bound_db is not None:
        if rl_bound_db <= top:
            ax.axhline(rl_bound_db, color=AFTER, lw=1.0, ls="--", alpha=0.6)
        where = "dashed" if rl_bound_db <= top else "above the chart"
        bound_row = f"{rl_bound_label}  RL {rl_bound_db:.1f} dB ({where})"
    _mark_worst_in_band(ax, freq_hz, scale, rl_before, rl_after, band_hz, bound_row)

    ax.set_ylim(0, top)
    ax.set_xlim(f[0], f[-1])
    ax.set_xlabel(f"Frequency ({unit})", color=INK)
    ax.set_ylabel("Return loss (dB)  — higher is better", color=INK)
    ax.grid(True, color="#e6eaee", lw=0.8)
    ax.set_axisbelow(True)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.tick_params(colors=INK, labelsize=9)
    ax.legend(loc="upper right", frameon=False, fontsize=9)
    draw_vswr_axis(ax, top)


def _mark_worst_in_band(ax, freq_hz, scale, rl_before, rl_after, band_hz,
                        bound_row: str | None = None) -> None:
    """Mark the smallest in-band return loss of both traces and list it, with VSWR and |Γ|
    (and ``bound_row``, the best achievable, as a last line when given).

    For a single-frequency match the values are those at that frequency (interpolated).
    """
    lo, hi = band_hz
    inside = np.flatnonzero((freq_hz >= lo) & (freq_hz <= hi)) if hi > lo else np.array([], int)
    heading = (f"worst in band {format_si(lo, 'Hz', 4)} – {format_si(hi, 'Hz', 4)}" if hi > lo
               else f"at {format_si(lo, 'Hz', 4)}")
    rows = [heading]
    for rl, colour, name in ((rl_before, BEFORE, "before"), (rl_after, AFTER, "after ")):
        if inside.size:
            i = inside[np.argmin(rl[inside])]
            f_mark, rl_mark = freq_hz[i], float(rl[i])
        else:
            f_mark, rl_mark = lo, float(np.interp(lo, freq_hz, rl))
        ax.plot([f_mark / scale], [min(rl_mark, RL_AXIS_TOP_DB - 0.5)], marker="o", ms=6.5,
                color=colour, mec="white", mew=1.3, zorder=5)
        gamma = float(metrics.gamma_from_return_loss(rl_mark))
        rl_text = f"{rl_mark:5.1f}" if rl_mark < RL_AXIS_TOP_DB else f">{RL_AXIS_TOP_DB:4.0f}"
        rows.append(f"{name}  RL {rl_text} dB   VSWR {float(metrics.vswr(gamma)):5.2f}   "
                    f"|Γ| {gamma:.3f}")
    if bound_row:
        rows.append(bound_row)
    ax.text(0.015, 0.975, "\n".join(rows), transform=ax.transAxes, ha="left", va="top",
            fontsize=8.5, color=INK, family="monospace", linespacing=1.5,
            bbox=dict(boxstyle="round,pad=0.45", fc="white", ec="#d5dbe1", alpha=0.92))


def draw_vswr_axis(ax, top_db: float) -> None:
    """A right-hand axis labelled in VSWR at the return-loss heights it corresponds to."""
    twin = ax.twinx()
    twin.set_ylim(ax.get_ylim())
    ratios = np.array([1.1, 1.2, 1.5, 2.0, 3.0, 6.0])
    gamma = (ratios - 1) / (ratios + 1)
    heights = metrics.return_loss_db(gamma)
    keep = heights <= top_db
    twin.set_yticks(heights[keep])
    twin.set_yticklabels([f"{r:g}" for r in ratios[keep]])
    twin.set_ylabel("VSWR", color=MUTED)
    twin.tick_params(colors=MUTED, labelsize=8.5)
    for side in ("top", "left", "bottom"):
        twin.spines[side].set_visible(False)
    twin.spines["right"].set_color("#d5dbe1")


# --- Smith-chart panel ------------------------------------------------------------------

_GRID_VALUES = (0.2, 0.5, 1.0, 2.0, 5.0)


def draw_smith_grid(ax) -> None:
    """Make ``ax`` a Smith chart: the unit circle, the impedance grid (constant r circles,
    constant x arcs, grey) and a faint admittance grid (constant g and b, sand) under it.

    Data coordinates are Gamma itself (real part right, imaginary part up).
    """
    ax.set_aspect("equal")
    ax.set_xlim(-1.16, 1.16)
    ax.set_ylim(-1.16, 1.16)
    ax.axis("off")
    sweep = np.concatenate([-np.logspace(3, -3, 400), [0.0], np.logspace(-3, 3, 400)])
    up = np.logspace(-3, 3, 600)
    for mirror, colour, lw in ((-1, GRID_Y, 0.7), (1, GRID_Z, 0.8)):   # admittance grid first, under
        for v in _GRID_VALUES:
            circle = reflection(v + 1j * sweep, 1.0) * mirror                 # constant r (or g)
            ax.plot(circle.real, circle.imag, color=colour, lw=lw, zorder=1)
            for sign in (1, -1):
                arc = reflection(up + 1j * sign * v, 1.0) * mirror            # constant x (or b)
                arc = np.concatenate([[reflection(1j * sign * v, 1.0) * mirror], arc])
                ax.plot(arc.real, arc.imag, color=colour, lw=lw, zorder=1)
    ax.plot([-1, 1], [0, 0], color=GRID_Z, lw=0.8, zorder=1)
    rim = np.exp(1j * np.linspace(0, 2 * np.pi, 400))
    ax.plot(rim.real, rim.imag, color=MUTED, lw=1.2, zorder=2)
    for v in _GRID_VALUES:
        g = reflection(v, 1.0)
        ax.text(g.real - 0.01, 0.012, f"{v:g}", fontsize=7, color=MUTED, ha="right", va="bottom")
        for sign in (1, -1):
            p = reflection(1j * sign * v, 1.0) * 1.075
            ax.text(p.real, p.imag, f"{'+' if sign > 0 else '−'}j{v:g}", fontsize=7, color=MUTED,
                    ha="center", va="center")
    ax.text(-1.075, 0, "0", fontsize=7, color=MUTED, ha="center", va="center")
    ax.text(1.075, 0, "∞", fontsize=8, color=MUTED, ha="center", va="center")


def _complex_interp(x: float, xp: np.ndarray, fp: np.ndarray) -> complex:
    return complex(np.interp(x, xp, fp.real), np.interp(x, xp, fp.imag))


def draw_spec_circle(ax, spec_rl_db: float) -> None:
    """The circle |Gamma| = spec on a Smith chart: inside it the return loss meets the spec."""
    ring = float(metrics.gamma_from_return_loss(spec_rl_db)) * np.exp(1j * np.linspace(0, 2 * np.pi, 200))
    ax.plot(ring.real, ring.imag, color=SPEC, lw=1.0, ls=":", zorder=2)
    ax.text(0, -abs(ring[0]) - 0.04, f"RL {spec_rl_db:g} dB", fontsize=7.5, color=SPEC,
            ha="center", va="top")


def draw_match_path(ax, elements: Sequence[Element], z_load: complex, freq_hz: float,
                    z0: float) -> complex:
    """Draw :func:`match_path` (one coloured arc per part, arrow at its end); the matched Gamma.

    Series moves are sage, shunt moves violet; each arc is labelled with its part. Returns
    the Gamma the path ends at (the load's own Gamma for an empty network).
    """
    paths = match_path(elements, z_load, freq_hz, z0)
    for element, path in zip(reversed(elements), paths):
        colour = SERIES_MOVE if element.position == "series" else SHUNT_MOVE
        ax.plot(path.real, path.imag, color=colour, lw=2.2, zorder=6,
                label=f"{element_text(element)} ({element.position} move)")
        ax.annotate("", xy=(path[-1].real, path[-1].imag), xytext=(path[-4].real, path[-4].imag),
                    arrowprops=dict(arrowstyle="-|>", color=colour, lw=1.5), zorder=6)
    return complex(paths[-1][-1]) if paths else complex(reflection(z_load, z0))


def _draw_smith(ax, freq_hz, s11_before, s11_after, band_hz, z0, elements, spec_rl_db,
                others=()) -> None:
    draw_smith_grid(ax)
    if spec_rl_db is not None:
        draw_spec_circle(ax, spec_rl_db)

    lo, hi = band_hz
    ax.plot(s11_before.real, s11_before.imag, color=BEFORE, lw=0.8, alpha=0.35, zorder=3)
    ax.plot(s11_after.real, s11_after.imag, color=AFTER, lw=0.8, alpha=0.35, zorder=3)
    inside = (freq_hz >= lo) & (freq_hz <= hi)
    if np.count_nonzero(inside) > 1:
        ax.plot(s11_before[inside].real, s11_before[inside].imag, color=BEFORE, lw=2.4,
                zorder=4, label="load over the band")
        ax.plot(s11_after[inside].real, s11_after[inside].imag, color=AFTER, lw=2.4,
                zorder=4, label="matched over the band")
        for label, s11 in others:
            ax.plot(s11[inside].real, s11[inside].imag, color=OTHER, lw=1.6, ls="--", zorder=4,
                    label=label)
        _label_band_edges(ax, freq_hz[inside], s11_before[inside])

    center = 0.5 * (lo + hi)
    gamma_load = _complex_interp(center, freq_hz, s11_before)
    z_load = z0 * (1 + gamma_load) / (1 - gamma_load)
    matched = draw_match_path(ax, elements, z_load, center, z0)
    ax.plot([gamma_load.real], [gamma_load.imag], ls="none", marker="o", ms=8, mfc="white",
            mec=BEFORE, mew=2, zorder=7, label=f"load at {format_si(center, 'Hz', 4)}")
    ax.plot([matched.real], [matched.imag], ls="none", marker="D", ms=7, color=AFTER,
            mec="white", mew=1, zorder=8, label=f"matched: |Γ| {abs(matched):.3f}")
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.01), ncol=2, frameon=False,
              fontsize=8, handlelength=1.6, columnspacing=1.2)
    ax.set_title("Smith chart  ·  impedance grid grey, admittance grid sand", fontsize=8.5,
                 color=MUTED, pad=4)


def _label_band_edges(ax, freq_hz: np.ndarray, gamma: np.ndarray) -> None:
    """Small frequency labels at both ends of the load's in-band trace."""
    for i in (0, -1):
        g = gamma[i]
        offset = 0.07 * g / abs(g) if abs(g) > 1e-9 else 0.07
        ax.text((g + offset).real, (g + offset).imag, format_si(float(freq_hz[i]), "Hz", 4),
                fontsize=7, color=BEFORE, ha="center", va="center", zorder=7)


def _save_atomically(fig, path: Path) -> Path:
    handle, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".tmp", dir=path.parent or Path("."))
    try:
        with os.fdopen(handle, "wb") as out:
            fig.savefig(out, format="png", dpi=DPI, facecolor="white")
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path
