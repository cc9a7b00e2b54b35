"""``matchbay report``: a self-contained HTML report of a lot or of one unit from the store."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from pipeline.cli import app
from pipeline.report import DEFAULT_UNIT_PLOTS, write_report


@app.command("report")
def report(
    store: str = typer.Argument(..., help="HDF5 results store (read only)."),
    out: Path = typer.Option(..., "-o", "--out", help="Folder to write the report into (created if needed)."),
    lot_id: Optional[str] = typer.Option(None, "--lot", help="Lot id (default: the store's only lot)."),
    dut: Optional[str] = typer.Option(None, "--dut", help="Report one unit (DUT id) instead of a lot."),
    unit_plots: int = typer.Option(DEFAULT_UNIT_PLOTS, help="Units of a lot that get a section with "
                                   "plots, lowest return loss first (every unit is in the table)."),
    workers: Optional[int] = typer.Option(None, help="Processes drawing the unit plots "
                                          "(default: all cores)."),
):
    """Write DIR/<lot>.html (or DIR/<dut>.html): one file, pictures embedded, opens anywhere."""
    path = write_report(store, out, lot=lot_id, dut=dut, unit_plots=unit_plots, workers=workers)
    print(path)
