"""``matchbay lot`` and ``matchbay demo``: batch-match a production lot into the store."""

from __future__ import annotations

import datetime as _dt
from pathlib import Path
from typing import List, Optional

import typer
from rich.console import Console
from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

from pipeline import batch
from pipeline.cli import app
from pipeline.cli.options import (FixtureFlags, build_settings, load_station,
                                  with_fixture_flags)
from pipeline.cli.summary import print_lot_summary
from pipeline.lotjob import analyse_lot, process_lot
from pipeline.report import write_report
from pipeline.store import ResultsStore

SAMPLE_LOT = Path(__file__).resolve().parents[2] / "sample_measurements" / "lot-915"
DEMO_BAND = "902M:928M"
DEMO_PARTS = "generic-0402"     # finite Q, self-resonance and tolerances of a generic 0402 family


def _default_lot_id(paths: list[str]) -> str:
    first = Path(paths[0])
    name = first.name if first.is_dir() else first.parent.name
    return name or "lot-" + _dt.date.today().isoformat()


def run_lot(paths: list[str], settings, store_path: str, *, workers=None, cluster=None,
            batch_size=50, mc_trials=2000, seed=0, console: Console) -> dict:
    """Process, analyse and print one lot; returns the summary dict."""
    files = batch.discover(paths)
    with ResultsStore(store_path, mode="a") as store:
        with Progress(TextColumn("[bold]matching[/]"), BarColumn(), MofNCompleteColumn(),
                      TimeRemainingColumn(), console=console, transient=True) as bar:
            task = bar.add_task("units", total=len(files))
            counts = process_lot(store, files, settings, workers=workers, cluster=cluster,
                                 batch_size=batch_size,
                                 progress=lambda n: bar.advance(task, n))
            bar.update(task, completed=len(files))
        summary = analyse_lot(store, settings.lot, settings, mc_trials=mc_trials, seed=seed)
    summary["this_run"] = counts
    print_lot_summary(summary, console)
    return summary


@app.command("lot")
@with_fixture_flags
def lot(
    paths: List[str] = typer.Argument(..., help="Touchstone files, folders (searched recursively) or globs."),
    band: Optional[str] = typer.Option(None, help="Band to match over, e.g. 902M:928M."),
    store: str = typer.Option(..., help="HDF5 results store (created if new)."),
    lot_id: Optional[str] = typer.Option(None, "--lot", help="Lot id (default: the folder name)."),
    spec_rl: Optional[float] = typer.Option(None, help="Return loss (dB) a unit must reach over the band."),
    series: Optional[str] = typer.Option(None, help="Part series: E6, E12, E24, E48, E96, E192 or ideal."),
    parts: Optional[str] = typer.Option(None, help="Part library name under configs/parts/ or a file."),
    fixture_flags: FixtureFlags = None,
    z0: Optional[float] = typer.Option(None, help="Reference impedance, ohm."),
    port: Optional[int] = typer.Option(None, help="Port whose reflection is matched in N-port files."),
    station: Optional[str] = typer.Option(None, help="Station file under configs/stations/ with defaults."),
    workers: Optional[int] = typer.Option(None, help="Worker processes (default: all cores)."),
    cluster: Optional[str] = typer.Option(None, help="Dask scheduler address, e.g. tcp://HOST:8786."),
    batch_size: int = typer.Option(50, help="Files per worker task."),
    mc_trials: int = typer.Option(2000, help="Monte Carlo trials for the tolerance yield."),
    seed: int = typer.Option(0, help="Seed of the tolerance Monte Carlo."),
):
    """Match every unit of a lot, log it in the store, choose one BOM for the line."""
    settings = build_settings(band=band, z0=z0, spec_rl=spec_rl, series=series, parts=parts,
                              fixture=fixture_flags,
                              port=port,
                              lot=lot_id or _default_lot_id(paths), station=load_station(station))
    run_lot(paths, settings, store, workers=workers, cluster=cluster, batch_size=batch_size,
            mc_trials=mc_trials, seed=seed, console=Console())


@app.command("demo")
def demo(
    out: Path = typer.Option(Path("matchbay-demo"), help="Folder for the demo store and report."),
    workers: Optional[int] = typer.Option(None, help="Worker processes (default: all cores)."),
):
    """Run the lot job end to end on the bundled sample lot (915 MHz ISM antennas)."""
    console = Console()
    out.mkdir(parents=True, exist_ok=True)
    store_path = out / "demo-lot.h5"
    if store_path.exists():
        store_path.unlink()            # the demo's own output, made fresh each run
    settings = build_settings(band=DEMO_BAND, lot="lot-915", spec_rl=10.0, parts=DEMO_PARTS)
    console.print(f"[bold]matchbay demo[/]: {SAMPLE_LOT.relative_to(SAMPLE_LOT.parents[1])} "
                  f"over {DEMO_BAND}, spec 10 dB, E24 {DEMO_PARTS} parts -> {store_path}")
    run_lot([str(SAMPLE_LOT)], settings, str(store_path), workers=workers, console=console)
    report = write_report(store_path, out, lot=settings.lot, workers=workers)
    console.print(f"report: [bold]{report}[/] (one HTML file; open it in any browser)")
    console.print(f"next: matchbay results list {store_path} --failing")
