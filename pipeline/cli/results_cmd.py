"""``matchbay results``: list, show, export and summarise what a results store holds.

Every sub-command opens the store read-only (SWMR), so it is safe while a lot or the
watcher is writing to it. A missing or invalid store is a
:class:`~pipeline.errors.StoreError`: one line on stderr, exit status 2.
"""

from __future__ import annotations

import json
import math
import os
import tempfile
from pathlib import Path
from typing import Optional

import pandas as pd
import typer
from rich.console import Console
from rich.table import Table
from rich.text import Text

from pipeline.cli import app
from pipeline.errors import MatchbayError, StoreError
from pipeline.store import ResultsStore, UnitRecord
from pipeline.units import format_si

results_app = typer.Typer(help="Look into a results store: list, show, export, summary.",
                          no_args_is_help=True)
app.add_typer(results_app, name="results")

#: The CSV columns of the interfaces contract, in order, and the frame column behind each.
CONTRACT_COLUMNS = {
    "dut_id": "dut_id", "lot": "lot", "source": "source", "source_sha256": "source_sha256",
    "band_lo_hz": "band_lo_hz", "band_hi_hz": "band_hi_hz",
    "return_loss_before_db": "rl_before_worst_db", "return_loss_after_db": "rl_after_worst_db",
    "elements": "elements",
}
_UNIT_SYMBOL = {"inductor": "H", "capacitor": "F", "resistor": "ohm"}
_KIND_LETTER = {"inductor": "L", "capacitor": "C", "resistor": "R"}

STORE_ARG = typer.Argument(..., help="HDF5 results store.", show_default=False)
LOT_OPTION = typer.Option(None, "--lot", help="Only this lot.")


def _fail(text: str) -> Text:
    return Text(text, style="bold red")


def _cells(*values) -> list[Text]:
    """Table cells without rich markup: DUT ids, paths and reasons are shown as typed."""
    return [v if isinstance(v, Text) else Text(str(v)) for v in values]


def _db(value: float) -> str:
    return "—" if value is None or not math.isfinite(value) else f"{value:.1f}"


def _db_unit(value: float) -> str:
    return "—" if value is None or not math.isfinite(value) else f"{value:.1f} dB"


def element_words(element: dict) -> str:
    """``'shunt C 3.3 pF'`` for one element dict of the interfaces contract."""
    kind = element.get("kind", "")
    value = format_si(float(element.get("value", float("nan"))), _UNIT_SYMBOL.get(kind, ""))
    return f"{element.get('position', '?')} {_KIND_LETTER.get(kind, kind)} {value}"


def network_words(elements: list[dict]) -> str:
    """The network from the source port to the load, or 'none needed' for no parts."""
    return ", ".join(element_words(e) for e in elements) if elements else "none needed"


def _elements_of(text: str) -> list[dict]:
    return json.loads(text) if text else []


# --------------------------------------------------------------------------- list

@results_app.command("list")
def list_units(
    store: Path = STORE_ARG,
    lot: Optional[str] = LOT_OPTION,
    failing: bool = typer.Option(False, "--failing",
                                 help="Only units that miss the spec with their lot's shared network "
                                      "(or with their own network, where no lot summary is stored)."),
):
    """One line per unit (latest record of each DUT): return loss, pass, network."""
    with ResultsStore(store, mode="r") as results:
        frame = results.units_frame(lot=lot)
        if failing:
            frame = frame[~frame["pass_after"] | frame["dut_id"].isin(_failing_with_shared(results, frame))]
    table = Table(title=f"{store}: {len(frame)} unit(s)" + (f" in lot {lot}" if lot else ""))
    for header, justify in (("#", "right"), ("DUT", "left"), ("lot", "left"),
                            ("RL before dB", "right"), ("RL after dB", "right"),
                            ("spec dB", "right"), ("pass", "center"), ("network", "left")):
        table.add_column(header, justify=justify)
    for record, row in frame.iterrows():
        table.add_row(*_cells(record, row["dut_id"], row["lot"], _db(row["rl_before_worst_db"]),
                              _db(row["rl_after_worst_db"]), _db(row["spec_rl_db"]),
                              "yes" if row["pass_after"] else _fail("no"),
                              network_words(_elements_of(row["elements"]))))
    Console().print(table)


def _failing_with_shared(results: ResultsStore, frame: pd.DataFrame) -> set[str]:
    """DUT ids that the stored shared networks of their lots leave failing."""
    failing: set[str] = set()
    for name in set(frame["lot"]):
        summary = results.get_lot(name) or {}
        failing.update((summary.get("shared") or {}).get("failing_unit_ids", []))
    return failing


# --------------------------------------------------------------------------- show

def _pick_record(results: ResultsStore, which: str) -> int:
    """``#12`` is record 12; anything else is a DUT id (its latest record)."""
    if which.startswith("#"):
        try:
            return int(which[1:])
        except ValueError:
            raise StoreError(f"{which!r} is not a record number (use #INDEX, e.g. #12)",
                             where=str(results.path)) from None
    index = results.latest_index_for(which)
    if index is None:
        raise StoreError(f"no unit with DUT id {which!r}", where=str(results.path))
    return index


def _key_value_table(title: str, rows: list[tuple]) -> Table:
    table = Table(title=Text(title, style="bold"), show_header=False, title_justify="left",
                  min_width=len(title) + 4)
    table.add_column("", style="bold")
    table.add_column("", overflow="fold")
    for key, value in rows:
        table.add_row(*_cells(key, value))
    return table


def _hz(value: float) -> str:
    return "—" if not math.isfinite(value) else format_si(value, "Hz")


def _metrics_rows(unit: UnitRecord) -> list[tuple[str, str]]:
    verdict = {True: "pass", False: "FAIL"}
    rows = [
        ("band", f"{_hz(unit.band_lo_hz)} – {_hz(unit.band_hi_hz)}"),
        ("z0", f"{unit.z0_ohm:g} ohm"),
        ("spec", f"return loss >= {_db_unit(unit.spec_rl_db)} over the band"),
        ("return loss, worst in band", f"{_db_unit(unit.rl_before_worst_db)} before, "
                                       f"{_db_unit(unit.rl_after_worst_db)} after"),
        ("return loss, band centre", f"{_db_unit(unit.rl_before_center_db)} before, "
                                     f"{_db_unit(unit.rl_after_center_db)} after"),
        ("bandwidth at the spec", f"{_hz(unit.bw_before_hz)} before, {_hz(unit.bw_after_hz)} after"),
        ("at the spec", f"{verdict[unit.pass_before]} before, {verdict[unit.pass_after]} after"),
    ]
    if math.isfinite(unit.delivered_fraction_min):
        rows.append(("delivered power, worst", f"{100 * unit.delivered_fraction_min:.1f} %"))
    for key, value in unit.headroom.items():
        if value is not None and not isinstance(value, (dict, list)):
            rows.append((f"headroom: {key}", f"{value:.4g}" if isinstance(value, float) else str(value)))
    return rows


def _provenance_rows(unit: UnitRecord, superseded_by: int | None) -> list[tuple[str, str]]:
    rows = [("record", f"#{unit.index}"), ("DUT id", unit.dut_id), ("lot", unit.lot or "—"),
            ("serial", unit.serial or "—"), ("source", unit.source or "—"),
            ("source sha256", unit.source_sha256 or "—"), ("acquired", unit.acquired_at or "—"),
            ("processed", unit.processed_at), ("tool version", unit.tool_version),
            ("settings hash", unit.settings_hash),
            ("traces", f"{len(unit.freq_hz)} points, {_hz(unit.freq_hz[0])} – {_hz(unit.freq_hz[-1])}")]
    if unit.replaces >= 0:
        rows.append(("replaces", f"#{unit.replaces}"))
    if superseded_by is not None and superseded_by != unit.index:
        rows.append(("superseded by", f"#{superseded_by} (the latest record of this DUT)"))
    return rows


def _step_words(step: dict) -> str:
    kind = step.get("type", "step")
    details = ", ".join(f"{k}={v}" for k, v in step.items() if k != "type")
    return f"{kind} ({details})" if details else kind


@results_app.command("show")
def show(
    store: Path = STORE_ARG,
    which: str = typer.Argument(..., metavar="DUT_ID|#INDEX",
                                help="A DUT id (its latest record) or a record number such as '#12' "
                                     "(quote it in a shell)."),
):
    """Everything stored about one unit: metrics, network, fixture, provenance."""
    with ResultsStore(store, mode="r") as results:
        unit = results.get_unit(_pick_record(results, which))
        latest = results.latest_index_for(unit.dut_id)
    console = Console()
    console.print(_key_value_table(f"Unit {unit.dut_id}", _provenance_rows(unit, latest)))
    console.print(_key_value_table("Metrics", _metrics_rows(unit)))
    network = [("topology", unit.topology or "—")]
    network += [(f"{i}", element_words(e) + _model_words(e)) for i, e in enumerate(unit.elements, 1)]
    if not unit.elements:
        network.append(("parts", "none needed"))
    console.print(_key_value_table("Network (source port first, toward the antenna)", network))
    fixture = [(f"{i}", _step_words(step)) for i, step in enumerate(unit.fixture, 1)] or [("", "none")]
    console.print(_key_value_table("Fixture removed (analyzer side first)", fixture))
    parts = [("series", unit.series or "—")]
    parts += [(f"library {key}", json.dumps(value)) for key, value in unit.parts.items()]
    console.print(_key_value_table("Parts", parts))


def _model_words(element: dict) -> str:
    models = [f"{k}={element[k]:.4g}" for k in ("q", "q_ref_hz", "esr_ohm", "srf_hz") if k in element]
    return f"  ({', '.join(models)})" if models else ""


# --------------------------------------------------------------------------- export

def _export_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """The contract columns first (renamed), then every other column; times in ISO 8601."""
    out = pd.DataFrame({name: frame[column] for name, column in CONTRACT_COLUMNS.items()})
    out.insert(0, "record", frame.index)
    taken = set(CONTRACT_COLUMNS.values())
    for column in frame.columns:
        if column in taken:
            continue
        values = frame[column]
        if isinstance(values.dtype, pd.DatetimeTZDtype):
            values = values.map(lambda t: "" if pd.isna(t) else t.isoformat())
        out[column] = values
    return out


def write_csv_atomically(frame: pd.DataFrame, out: Path) -> None:
    """Write ``out`` through a temporary file in the same folder: never half-written."""
    folder = out.parent if str(out.parent) else Path(".")
    if not folder.is_dir():
        raise MatchbayError("folder does not exist", where=str(out))
    fd, temporary = tempfile.mkstemp(prefix=f".{out.name}.", suffix=".part", dir=folder)
    try:
        with os.fdopen(fd, "w", newline="", encoding="utf-8") as fh:
            frame.to_csv(fh, index=False)
        os.replace(temporary, out)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise


@results_app.command("export")
def export(
    store: Path = STORE_ARG,
    csv: Path = typer.Option(..., "--csv", help="CSV file to write (replaced if it exists)."),
    lot: Optional[str] = LOT_OPTION,
):
    """One CSV row per unit (latest record of each DUT), contract columns first."""
    with ResultsStore(store, mode="r") as results:
        frame = results.units_frame(lot=lot)
    write_csv_atomically(_export_frame(frame), csv)
    Console().print(f"wrote {len(frame)} unit(s) to {csv}")


# --------------------------------------------------------------------------- summary

def _percent(part: int, whole: int) -> str:
    return f"{part}/{whole} ({100 * part / whole:.0f} %)" if whole else "0/0"


def _lot_rows(frame: pd.DataFrame) -> list[tuple[str, str]]:
    n = len(frame)
    specs = sorted(set(frame["spec_rl_db"].dropna().round(3)))
    rows = [("units", str(n)),
            ("spec", ", ".join(f"{s:g} dB" for s in specs) or "—"),
            ("pass before matching", _percent(int(frame["pass_before"].sum()), n)),
            ("pass with own network", _percent(int(frame["pass_after"].sum()), n))]
    for label, column in (("RL before", "rl_before_worst_db"), ("RL after (own)", "rl_after_worst_db")):
        values = frame[column].dropna()
        if len(values):
            rows.append((f"{label}, worst in band", f"median {values.median():.1f} dB, "
                                                    f"worst {values.min():.1f} dB"))
    return rows


def _stored_lot_rows(summary: dict) -> list[tuple[str, str]]:
    """The stored shared network, its yield, and the predicted production yield."""
    shared = summary.get("shared") or {}
    if "elements" not in shared:
        return [("shared network", "none stored")]
    rows = [("shared network", network_words(shared["elements"])),
            ("pass with the shared network", _percent(shared["n_pass"], shared["n_units"]))]
    tolerance = summary.get("tolerance")
    if tolerance:
        rows.append(("predicted production yield",
                     f"{100 * tolerance['yield_fraction']:.1f} % ({int(100 * tolerance['confidence'])} % CI "
                     f"{100 * tolerance['ci_low']:.1f}–{100 * tolerance['ci_high']:.1f} %; "
                     f"{tolerance['n_trials']} trials, part tolerances {tolerance['distribution']})"))
    failing = shared.get("failing_unit_ids", [])
    rows.append(("left failing by it", ", ".join(failing) or "none"))
    return rows


@results_app.command("summary")
def summary(store: Path = STORE_ARG, lot: Optional[str] = LOT_OPTION):
    """Per lot: units, pass rates at the spec, return loss, failed files, shared network."""
    with ResultsStore(store, mode="r") as results:
        lots = [lot] if lot is not None else results.lots() or [""]
        blocks = [(name, results.units_frame(lot=name), results.failures_frame(lot=name),
                   results.get_lot(name)) for name in lots]
    console = Console()
    for name, frame, failures, stored in blocks:
        rows = _lot_rows(frame)
        rows.append(("failed files", str(len(failures))))
        rows += [(f"  {source}", reason) for source, reason in zip(failures["source"], failures["reason"])]
        rows += _stored_lot_rows(stored) if stored else [("shared network", "none stored")]
        console.print(_key_value_table(f"Lot {name or '(none)'}", rows))

