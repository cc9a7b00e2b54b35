"""``matchbay match FILE (--at F | --band F1:F2)``: one measured antenna, its L-network.

The command reads the file (:func:`pipeline.acquire.read_sweep`), hands the sweep to the
matcher (:mod:`pipeline.match`) and prints either a readable table (rich) or the JSON
object of the interfaces contract (``--json``). ``--plot`` writes the two-panel figure of
:mod:`pipeline.plots`. No RF logic lives here beyond choosing what to show.

Every user error (bad file, bad option, a frequency outside the sweep) is a
:class:`~pipeline.errors.MatchbayError`: one line on stderr, exit status 2, and nothing
written (the plot path is checked first, the PNG is written last and atomically).
"""

from __future__ import annotations

import json
import sys
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Optional

import numpy as np
import typer

from pipeline import metrics
from pipeline.acquire import IngestWarning, read_sweep
from pipeline.cli import app
from pipeline.cli.options import FixtureFlags, with_fixture_flags
from pipeline.config import load_defaults
from pipeline.deembed import FixtureChain, passivity_warning
from pipeline.elements import Element
from pipeline.errors import ConfigError, MatchbayError, MatchError
from pipeline.headroom import Headroom, analyse_band
from pipeline.match import Solution, band_points, match_at, match_band, predicted_gamma
from pipeline.networks import delivered_fraction, element_ladder, reflection
from pipeline.parts import PartLibrary, check_series, load_parts, nearest_standard
from pipeline.plots import element_text, network_text
from pipeline.sweep import Sweep
from pipeline.units import format_si, parse_band, parse_frequency

SNAP_PREVIEW_SERIES = "E24"     # shown beside exact --at values: the nearest buildable pair


@dataclass(frozen=True)
class MatchRequest:
    """What the user asked for, in SI units, defaults filled in."""

    band_hz: tuple[float, float]         # (f, f) for --at
    single_frequency: bool
    z0_ohm: float
    series: str
    parts: PartLibrary
    port: int
    max_bytes: int
    fixture: FixtureChain
    spec_rl_db: float


@dataclass(frozen=True)
class MatchResult:
    """The answer for one file."""

    raw: Sweep                           # as read, at the analyzer's reference plane
    sweep: Sweep                         # the load the network was computed for (de-embedded)
    request: MatchRequest
    return_loss_before_db: float         # worst in band (at f for --at), unmatched
    solutions: list[Solution]
    previews: list[Solution | None]      # nearest standard-valued pair per exact solution
    headroom: Headroom | None            # Bode-Fano headroom of the best band match


@app.command("match")
@with_fixture_flags
def match(
    file: str = typer.Argument(..., help="Touchstone file (.s1p, .s2p, ... or .ts)."),
    at: Optional[str] = typer.Option(None, "--at", help="Match exactly at one frequency, e.g. 915M."),
    band: Optional[str] = typer.Option(None, "--band", help="Match over a band, e.g. 902M:928M."),
    port: int = typer.Option(1, "--port", help="Port whose reflection S_pp is matched (N-port files)."),
    z0: Optional[float] = typer.Option(None, "--z0", help="Reference impedance to match to, ohm."),
    series: Optional[str] = typer.Option(None, "--series",
                                         help="Part values: E6, E12, E24, E48, E96, E192 or ideal."),
    parts: Optional[str] = typer.Option(None, "--parts", help="Part library name under configs/parts/ or a file."),
    as_json: bool = typer.Option(False, "--json", help="Print the result as one JSON object."),
    plot: Optional[str] = typer.Option(None, "--plot", help="Write the return-loss / Smith-chart figure (PNG)."),
    max_mb: Optional[float] = typer.Option(None, "--max-mb", help="Refuse input files larger than this (MB)."),
    spec_rl: Optional[float] = typer.Option(None, "--spec-rl", help="Return loss (dB) the match must reach (for the headroom verdict)."),
    fixture_flags: FixtureFlags = None,
) -> None:
    """Design a two-element L-network for a measured antenna."""
    request = _request(at=at, band=band, port=port, z0=z0, series=series, parts=parts,
                       max_mb=max_mb, spec_rl=spec_rl, fixture=fixture_flags)
    plot_path = _checked_plot_path(plot)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", IngestWarning)
        raw = read_sweep(file, port=request.port, z0=request.z0_ohm, max_bytes=request.max_bytes)
    # Ingest -> de-embed -> match: from here on `sweep` is the load at the antenna's feed.
    sweep = request.fixture.apply(raw)
    result = _solve(raw, sweep, request)
    if plot_path is not None:
        _write_plot(plot_path, result)
    for warning in caught:
        print(f"matchbay: warning: {warning.message}", file=sys.stderr)
    caution = passivity_warning(sweep)
    if caution:
        print(f"matchbay: warning: {sweep.provenance.source}: {caution}", file=sys.stderr)
    if as_json:
        print(json.dumps(result_json(result), indent=2))
    else:
        _print_readable(result, plot_path)


# --- options ----------------------------------------------------------------------------

def _request(*, at, band, port, z0, series, parts, max_mb, spec_rl, fixture: FixtureFlags) -> MatchRequest:
    if (at is None) == (band is None):
        raise ConfigError("give exactly one of --at F (e.g. 915M) or --band F1:F2 (e.g. 902M:928M)",
                          where="--at/--band")
    defaults = load_defaults()
    if at is not None:
        f = _option(parse_frequency, at, "--at")
        band_hz, single = (f, f), True
    else:
        band_hz, single = _option(parse_band, band, "--band"), False
    z0 = float(defaults["z0_ohm"] if z0 is None else z0)
    if not (np.isfinite(z0) and z0 > 0):
        raise ConfigError(f"reference impedance {z0:g} ohm must be positive", where="--z0")
    max_mb = float(defaults["max_file_mb"] if max_mb is None else max_mb)
    if not (np.isfinite(max_mb) and max_mb > 0):
        raise ConfigError(f"size limit {max_mb:g} MB must be positive", where="--max-mb")
    spec = float(defaults["spec_rl_db"] if spec_rl is None else spec_rl)
    if not (np.isfinite(spec) and spec > 0):
        raise ConfigError(f"spec {spec:g} dB must be a positive return loss", where="--spec-rl")
    chosen_series = series or defaults["series_at" if single else "series_band"]
    return MatchRequest(band_hz=band_hz, single_frequency=single, z0_ohm=z0,
                        series=check_series(chosen_series, where="--series"),
                        parts=load_parts(parts or defaults["parts"]), port=port,
                        max_bytes=int(max_mb * 1024 ** 2), fixture=fixture.chain(),
                        spec_rl_db=spec)


def _option(parse, text: str, flag: str):
    """Parse an option value; its error names the option."""
    try:
        return parse(text)
    except ConfigError as error:
        raise ConfigError(error.message, where=flag) from None


def _checked_plot_path(plot: str | None) -> Path | None:
    """The --plot path, refused before any work if it cannot be written."""
    if plot is None:
        return None
    path = Path(plot)
    if path.suffix.lower() != ".png":
        raise ConfigError("the plot is written as PNG: give a file name ending in .png", where=plot)
    if not path.parent.is_dir():
        raise ConfigError(f"folder {str(path.parent)!r} does not exist", where=plot)
    if path.is_dir():
        raise ConfigError("is a folder; give a file name ending in .png", where=plot)
    return path


# --- solving ------------------------------------------------------------------------------

def _gamma_at(sweep: Sweep, freq_hz: float) -> complex:
    """S11 at ``freq_hz`` inside the sweep, linear in real and imaginary parts."""
    f = sweep.freq_hz
    if not f[0] <= freq_hz <= f[-1]:
        raise MatchError(f"--at {format_si(freq_hz, 'Hz', 4)} is outside the sweep "
                         f"({format_si(f[0], 'Hz', 4)} to {format_si(f[-1], 'Hz', 4)})",
                         where=sweep.provenance.source)
    s = sweep.s11
    return complex(np.interp(freq_hz, f, s.real), np.interp(freq_hz, f, s.imag))


def _solve(raw: Sweep, sweep: Sweep, request: MatchRequest) -> MatchResult:
    """Match the (de-embedded) sweep at one frequency or over the band, as asked; for a
    band, also the Bode-Fano headroom of the best network."""
    solve = _solve_at if request.single_frequency else _solve_band
    before, solutions, previews = solve(sweep, request)
    headroom = None
    if not request.single_frequency:
        headroom = analyse_band(sweep.freq_hz, sweep.z_ohm, request.band_hz,
                                solutions[0].return_loss_db, request.spec_rl_db)
    return MatchResult(raw=raw, sweep=sweep, request=request, return_loss_before_db=before,
                       solutions=solutions, previews=previews, headroom=headroom)


def _solve_at(sweep: Sweep, request: MatchRequest):
    """Exact closed-form solutions at f; real parts when a series or lossy library is asked
    for, otherwise exact values with the nearest standard-valued pair as a preview."""
    f, z0 = request.band_hz[0], request.z0_ohm
    gamma = _gamma_at(sweep, f)
    z_load = z0 * (1 + gamma) / (1 - gamma)
    try:
        exact = match_at(z_load, f, z0)
    except MatchError as error:
        raise MatchError(error.message, where=sweep.provenance.source) from None
    before = float(metrics.return_loss_db(gamma))
    if request.series != "ideal" or not request.parts.is_ideal:
        built = [_realised(s, request.series, request.parts, f, z_load, z0) for s in exact]
        built.sort(key=lambda s: -s.return_loss_db)
        return before, built, [None] * len(built)
    previews = [_realised(s, SNAP_PREVIEW_SERIES, request.parts, f, z_load, z0) if s.elements else None
                for s in exact]
    return before, exact, previews


def _solve_band(sweep: Sweep, request: MatchRequest):
    """Band-optimised solutions; "before" is the bare load's worst RL on the same points."""
    where, z0 = sweep.provenance.source, request.z0_ohm
    solutions = match_band(sweep.freq_hz, sweep.z_ohm, request.band_hz, z0=z0,
                           series=request.series, parts=request.parts, where=where)
    _, z_band = band_points(sweep.freq_hz, sweep.z_ohm, request.band_hz, z0, where)
    before = float(np.min(metrics.return_loss_db(reflection(z_band, z0))))
    return before, solutions, [None] * len(solutions)


def _realised(solution: Solution, series: str, parts: PartLibrary, freq_hz: float,
              z_load: complex, z0: float) -> Solution:
    """An exact one-frequency solution built from real parts: values snapped to ``series``
    (nearest by ratio), each part evaluated with the library's model at ``freq_hz``."""
    elements = tuple(
        Element(e.position, e.kind, value, parts.model_for(e.kind, value))
        for e in solution.elements
        for value in (float(nearest_standard(e.value, series)),)
    )
    rl = float(metrics.return_loss_db(predicted_gamma(elements, [freq_hz], [z_load], z0)[0]))
    delivered = float(np.min(delivered_fraction(element_ladder(elements, [freq_hz]), z_load, z0)))
    return Solution(elements=elements, topology=solution.topology, return_loss_db=rl,
                    return_loss_center_db=rl, delivered_fraction_min=delivered, series=series)


# --- output -------------------------------------------------------------------------------

def result_json(result: MatchResult) -> dict:
    """The interfaces.md object for ``matchbay match --json`` (plus a few added keys)."""
    sweep, request = result.sweep, result.request
    prov = sweep.provenance
    solutions = []
    for solution, preview in zip(result.solutions, result.previews):
        entry = solution.as_dict()
        if preview is not None:
            entry["nearest_standard"] = preview.as_dict()
        solutions.append(entry)
    return {
        "source": prov.source,
        "source_sha256": prov.source_sha256,
        "z0_ohm": request.z0_ohm,
        "band_hz": [float(request.band_hz[0]), float(request.band_hz[1])],
        "return_loss_before_db": result.return_loss_before_db,
        "solutions": solutions,
        "dut_id": prov.dut_id,
        "port": prov.port,
        "acquired_at": prov.acquired_at,
        "series": request.series,
        "parts": request.parts.as_dict(),
        "fixture": list(prov.fixture),
        "spec_rl_db": request.spec_rl_db,
        "headroom": None if result.headroom is None else result.headroom.as_dict(),
    }


def _rl_text(rl_db: float) -> str:
    return "> 60 dB" if rl_db > 60 else f"{rl_db:.1f} dB"


def _vswr_text(rl_db: float) -> str:
    return f"{float(metrics.vswr(metrics.gamma_from_return_loss(rl_db))):.2f}"


def _print_readable(result: MatchResult, plot_path: Path | None) -> None:
    from rich.console import Console
    from rich.table import Table

    console = Console(width=None if sys.stdout.isatty() else 140, highlight=False)
    sweep, request = result.sweep, result.request
    prov = sweep.provenance
    lo, hi = request.band_hz
    where = (f"at {format_si(lo, 'Hz', 4)}" if request.single_frequency
             else f"over {format_si(lo, 'Hz', 4)} – {format_si(hi, 'Hz', 4)}")
    console.print(f"[bold]{prov.dut_id}[/]  {prov.source}  (sha256 {prov.source_sha256[:12]}…)")
    console.print(f"S{prov.port}{prov.port}, {sweep.freq_hz.size} points "
                  f"{format_si(sweep.freq_hz[0], 'Hz', 4)} – {format_si(sweep.freq_hz[-1], 'Hz', 4)}, "
                  f"z0 {request.z0_ohm:g} Ω")
    for line in request.fixture.summary():
        console.print(f"de-embedded: {line}")
    console.print(f"Return loss before matching {where}: [bold]{_rl_text(result.return_loss_before_db)}[/]"
                  f" (VSWR {_vswr_text(result.return_loss_before_db)})")

    worst = "RL" if request.single_frequency else "RL worst"
    table = Table(show_edge=False, header_style="bold", pad_edge=False)
    table.add_column("#", justify="right")
    table.add_column("network, radio to antenna")
    table.add_column(worst, justify="right")
    if not request.single_frequency:
        table.add_column("RL centre", justify="right")
    table.add_column("VSWR", justify="right")
    table.add_column("power to antenna", justify="right")
    show_preview = any(p is not None for p in result.previews)
    if show_preview:
        table.add_column(f"nearest {SNAP_PREVIEW_SERIES}")
        table.add_column(f"RL ({SNAP_PREVIEW_SERIES})", justify="right")
    for n, (solution, preview) in enumerate(zip(result.solutions, result.previews), start=1):
        text = network_text(solution.elements) if solution.elements else "no network needed"
        row = [str(n), text, _rl_text(solution.return_loss_db)]
        if not request.single_frequency:
            row.append(_rl_text(solution.return_loss_center_db))
        row += [_vswr_text(solution.return_loss_db), f"{100 * solution.delivered_fraction_min:.1f} %"]
        if show_preview:
            row += (["", ""] if preview is None else
                    [" ─ ".join(element_text(e) for e in preview.elements), _rl_text(preview.return_loss_db)])
        table.add_row(*row)
    console.print(table)
    values = "exact values" if request.series == "ideal" else f"{request.series} values (IEC 60063)"
    console.print(f"[dim]{values}; parts: {request.parts.name}"
                  f"{'' if request.parts.is_ideal else ' (Q, ESR, self-resonance modelled)'}; "
                  f"power to antenna: worst fraction of the available power "
                  f"{'at f' if request.single_frequency else 'over the band'}.[/]")
    if result.headroom is not None:
        h = result.headroom.as_dict()
        if h["rl_bound_db"] is not None:
            limit = "above 40 dB" if h["rl_bound_db"] > 40 else f"{h['rl_bound_db']:.1f} dB"
            console.print(f"Bode–Fano limit for this antenna over the band (Q ≈ {h['q_estimate']:.1f}): "
                          f"{limit} with an ideal lossless network of any order.")
        console.print(f"Headroom: {h['verdict']}")
    console.print("[dim]Check on the board: part tolerances, pads and nearby ground shift the match.[/]")
    if plot_path is not None:
        console.print(f"plot written to {plot_path}")


def _write_plot(path: Path, result: MatchResult) -> None:
    from pipeline.plots import plot_match

    sweep, request = result.sweep, result.request
    best = result.solutions[0]
    after = predicted_gamma(best.elements, sweep.freq_hz, sweep.z_ohm, request.z0_ohm)
    lo, hi = request.band_hz
    span = (f"at {format_si(lo, 'Hz', 4)}" if request.single_frequency
            else f"over {format_si(lo, 'Hz', 4)} – {format_si(hi, 'Hz', 4)}")
    bound = None if result.headroom is None else result.headroom.as_dict()["rl_bound_db"]
    try:
        plot_match(path, sweep.freq_hz, sweep.s11, after, request.band_hz, request.z0_ohm,
                   best.elements, title=f"{sweep.provenance.dut_id}: L-network match {span}",
                   rl_bound_db=bound, spec_rl_db=None if request.single_frequency else request.spec_rl_db)
    except OSError as error:
        raise MatchbayError(f"cannot write the plot: {error.strerror or error}", where=str(path)) from None
