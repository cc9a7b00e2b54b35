"""``matchbay fixture``: fit a port extension from an open/short sweep; show a fixture chain.

``matchbay fixture fit OPEN.s1p --standard open [--fringe-c 0.02p] -o configs/fixtures/NAME.toml``
writes a one-step chain file that ``--fixture NAME`` then applies before matching.
``matchbay fixture show NAME|FILE [--at 2.4G]`` lists a chain's steps and, at a frequency,
each step's one-way loss and the round-trip phase it adds to the reflection.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Optional

import numpy as np
import typer
from rich.console import Console
from rich.table import Table

from pipeline.cli import app
from pipeline.config import load_defaults
from pipeline.deembed import FixtureChain, load_chain, write_chain_toml
from pipeline.errors import ConfigError
from pipeline.fixture_fit import STANDARDS, fit_port_extension
from pipeline.units import format_si, parse_band, parse_frequency, parse_quantity

fixture_app = typer.Typer(
    help="Fixture chains for de-embedding: fit a port extension, show a chain.",
    no_args_is_help=True,
)
app.add_typer(fixture_app, name="fixture")

CAUTION = ("Caution: analyzer ports are static- and DC-sensitive: discharge cables and fixtures "
           "before connecting, never apply DC, stay within the port's rated input power.")
PHASE_RMS_CAUTION_DEG = 5.0    # above this the fixture is probably not a matched line
LOSS_RMS_CAUTION_DB = 0.05


def _fit_report(fit, source: str, written: Path) -> dict:
    return {"source": source, "written": str(written), "standard": fit.standard,
            "fringe_c_f": fit.fringe_c_f, "freq_lo_hz": fit.freq_lo_hz, "freq_hi_hz": fit.freq_hi_hz,
            "points": fit.points, "extension": fit.extension.describe(),
            "phase_rms_deg": fit.phase_rms_deg, "loss_rms_db": fit.loss_rms_db,
            "phase_offset_deg": fit.phase_offset_deg,
            "loss_convention": "one-way loss of the fixture, dB (the reflection sees it twice)"}


def _fit_cautions(fit) -> list[str]:
    notes = []
    if fit.phase_rms_deg > PHASE_RMS_CAUTION_DEG:
        notes.append(f"phase ripple {fit.phase_rms_deg:.1f} deg RMS: the fixture is probably not a "
                     "matched line; describe it as a line step with its own impedance, or measure it "
                     "as a 2-port file")
    if fit.loss_rms_db > LOSS_RMS_CAUTION_DB:
        notes.append(f"loss residual {fit.loss_rms_db:.2f} dB RMS: the sqrt(f) loss model fits poorly")
    return notes


@fixture_app.command("fit")
def fit(
    sweep_file: Path = typer.Argument(..., help="Touchstone sweep of the fixture left open (or shorted) "
                                                 "where the antenna will be."),
    out: Path = typer.Option(..., "--out", "-o", help="Chain file to write, e.g. configs/fixtures/NAME.toml."),
    standard: str = typer.Option("open", help="The standard at the fixture's far end: open or short."),
    fringe_c: Optional[str] = typer.Option(None, help="Fringing capacitance of the open, e.g. 0.02p."),
    band: Optional[str] = typer.Option(None, help="Fit over F1:F2 only (default: the whole sweep)."),
    loss_ref: Optional[str] = typer.Option(None, help="Frequency the fitted loss is stated at "
                                                       "(default: the top of the fitted range)."),
    name: Optional[str] = typer.Option(None, help="Chain name (default: the output file's stem)."),
    port: int = typer.Option(1, help="Port whose reflection is used in N-port files."),
    z0: Optional[float] = typer.Option(None, help="Reference impedance, ohm (default from configs/default.toml)."),
    force: bool = typer.Option(False, "--force", help="Overwrite an existing chain file."),
    json_out: bool = typer.Option(False, "--json", help="Print the fit as one JSON object."),
):
    """Fit a port extension (one-way delay and loss) and write it as a fixture chain file."""
    from pipeline.acquire import read_sweep

    if standard not in STANDARDS:
        raise ConfigError(f"unknown standard {standard!r} (allowed: {', '.join(STANDARDS)})", where="--standard")
    if out.exists() and not force:
        raise ConfigError("exists already; use --force to overwrite", where=str(out))
    reference = float(z0 if z0 is not None else load_defaults()["z0_ohm"])
    sweep = read_sweep(sweep_file, port=port, z0=reference)
    chosen = np.arange(sweep.freq_hz.size) if band is None else sweep.band_indices(parse_band(band))
    if chosen.size < 3:
        raise ConfigError("fewer than 3 sweep points inside the band", where="--band")
    fringe = 0.0 if fringe_c is None else parse_quantity(fringe_c, "F", what="fringing capacitance")
    try:
        result = fit_port_extension(sweep.freq_hz[chosen], sweep.s11[chosen], standard=standard,
                                    fringe_c_f=fringe, z0=reference,
                                    loss_ref_hz=None if loss_ref is None else parse_frequency(loss_ref))
    except ConfigError as error:
        error.where = error.where or str(sweep_file)
        raise
    chain = FixtureChain(steps=(result.extension,), name=name or out.stem, source=str(out))
    write_chain_toml(out, chain, comments=result.as_comments() + (f"from {sweep_file}",))
    notes = _fit_cautions(result)
    if json_out:
        print(json.dumps({**_fit_report(result, str(sweep_file), out), "cautions": notes}))
        return
    console = Console()
    ext = result.extension
    console.print(f"[bold]port extension[/] from {sweep_file} ({result.standard}, {result.points} points, "
                  f"{format_si(result.freq_lo_hz, 'Hz')} to {format_si(result.freq_hi_hz, 'Hz')})")
    console.print(f"  delay (one way)   {ext.delay_s * 1e12:.2f} ps")
    console.print(f"  loss (one way)    {ext.loss_db_dc:.3f} dB at DC, {ext.loss_db_at_ref:.3f} dB at "
                  f"{format_si(ext.loss_ref_hz, 'Hz')}  (the reflection sees it twice)")
    console.print(f"  residuals         phase {result.phase_rms_deg:.2f} deg RMS, loss "
                  f"{result.loss_rms_db:.3f} dB RMS, offset at 0 Hz {result.phase_offset_deg:.1f} deg")
    for note in notes:
        console.print(f"[yellow]caution:[/] {note}")
    console.print(f"wrote {out}  (use --fixture {out})")
    console.print(f"[dim]{CAUTION}[/]")


def _unwrapped_from_dc(freq_hz: np.ndarray, s21: np.ndarray) -> np.ndarray:
    """Unwrapped phase of S21 (rad), with the whole turns below the first point chosen so
    that a line through the first points extrapolates to about 0 at 0 Hz."""
    phase = np.unwrap(np.angle(s21))
    head = max(2, freq_hz.size // 10)
    slope, intercept = np.polyfit(freq_hz[:head], phase[:head], 1)
    return phase - 2 * np.pi * np.round(intercept / (2 * np.pi))


def _grid_for(chain: FixtureChain, at_hz: float) -> np.ndarray:
    """A fine frequency grid up to ``at_hz`` that every step (fixture files too) covers."""
    lo, hi = at_hz / 2000, np.inf
    for step in chain.steps:
        if hasattr(step, "freq_range_hz"):
            lo, hi = max(lo, step.freq_range_hz[0]), min(hi, step.freq_range_hz[1])
    if not lo <= at_hz <= hi:
        raise ConfigError(f"{format_si(at_hz, 'Hz')} is outside the fixture file's range "
                          f"({format_si(lo, 'Hz')} to {format_si(hi, 'Hz')})", where="--at")
    return np.linspace(lo, at_hz, 2001)


def responses_at(chain: FixtureChain, at_hz: float, z0: float) -> list[dict]:
    """Per step and for the whole chain: one-way loss (dB) and round-trip phase (deg) at at_hz."""
    grid = _grid_for(chain, at_hz)
    networks = [step.network(grid, z0) for step in chain.steps]
    total = networks[0]
    for network in networks[1:]:
        total = total ** network
    rows = []
    for label, network in [(str(i + 1), n) for i, n in enumerate(networks)] + [("total", total)]:
        s21 = network.s[:, 1, 0]
        loss_db = round(float(-20 * np.log10(abs(s21[-1]))), 9) + 0.0       # no "-0.000"
        phase_deg = float(-2 * np.degrees(_unwrapped_from_dc(grid, s21)[-1]))
        rows.append({"step": label, "one_way_loss_db": loss_db, "round_trip_phase_deg": phase_deg})
    return rows


@fixture_app.command("show")
def show(
    fixture: str = typer.Argument(..., help="Chain name under configs/fixtures/ or a TOML file."),
    at: Optional[str] = typer.Option(None, help="Also give each step's loss and phase at this frequency, e.g. 2.4G."),
    z0: Optional[float] = typer.Option(None, help="Reference impedance, ohm (default from configs/default.toml)."),
    json_out: bool = typer.Option(False, "--json", help="Print the chain as one JSON object."),
):
    """List a fixture chain's steps, analyzer side first."""
    chain = load_chain(fixture)
    reference = float(z0 if z0 is not None else load_defaults()["z0_ohm"])
    at_hz = None if at is None else parse_frequency(at)
    rows = responses_at(chain, at_hz, reference) if at_hz is not None else []
    if json_out:
        print(json.dumps({"name": chain.name, "source": chain.source, "steps": chain.describe(),
                          "at_hz": at_hz, "z0_ohm": reference, "responses": rows}))
        return
    console = Console()
    console.print(f"[bold]fixture {chain.name}[/]  ({chain.source}); steps from the analyzer toward the device:")
    table = Table(show_header=True, header_style="bold")
    table.add_column("#", justify="right")
    table.add_column("step")
    if rows:
        table.add_column(f"one-way loss at {format_si(at_hz, 'Hz')}", justify="right")
        table.add_column("round-trip phase", justify="right")
    for i, text in enumerate(chain.summary()):
        extra = [f"{rows[i]['one_way_loss_db']:.3f} dB", f"{rows[i]['round_trip_phase_deg']:.1f} deg"] if rows else []
        table.add_row(str(i + 1), text, *extra)
    if rows:
        table.add_row("", "whole chain", f"{rows[-1]['one_way_loss_db']:.3f} dB",
                      f"{rows[-1]['round_trip_phase_deg']:.1f} deg")
    console.print(table)
    console.print("loss: one-way insertion loss of the fixture (the reflection sees it twice)")
