"""``matchbay measure``: measure antennas on a live analyzer over SCPI, match, show, store.

One measurement (``--dut-id``), or the bench loop (``--loop``): DUT ids are read one per
line from standard input (typed, or from a barcode scanner, which types a line and Enter)
and each is measured and shown until an empty line, ``q``, end of input or Ctrl-C; then a
short session summary. ``--simulate [LOAD]`` runs the same flow against the simulated
analyzer on 127.0.0.1 serving a Touchstone file or a bundled sample, so the bench flow can
be tried without hardware.

The flow itself is :mod:`pipeline.bench`; this module parses, connects and prints. A
failed single measurement is one line on stderr naming the step and exit status 2; in the
loop the failure is reported for that DUT and the loop goes on. Nothing partial is ever
stored, and a store that does not exist yet is created by the first good measurement only.
"""

from __future__ import annotations

import json
import logging
import sys
from contextlib import contextmanager
from datetime import datetime, timezone
from pathlib import Path
from typing import Iterator, Optional

import typer
from rich.console import Console
from rich.markup import escape

from instruments import Analyzer, SimulatedAnalyzer, load_profile
from pipeline.bench import (BenchPlan, BenchSession, Measurement, SessionTally, check_dut_id, plan_sweep,
                            read_dut_ids, run_loop)
from pipeline.cli import app
from pipeline.cli.options import (FixtureFlags, build_settings, load_station,
                                  with_fixture_flags)
from pipeline.deembed import passivity_warning, summarize_step
from pipeline.elements import Element
from pipeline.errors import ConfigError, InputFileError, MatchbayError
from pipeline.plots import network_text
from pipeline.sweep import Sweep
from pipeline.units import format_si, parse_frequency, parse_quantity

SAMPLES = Path(__file__).resolve().parents[2] / "sample_measurements"
#: Bundled samples ``--simulate`` can serve, with the band each is matched over by default.
SAMPLE_BANDS = {"larkspur_915": "902M:928M", "wren_chip_2g4": "2.4G:2.4835G"}
DEFAULT_SIMULATED = "larkspur_915"
DEFAULT_PROFILE = "generic-scpi"
DEFAULT_POINTS = 401
DEFAULT_IFBW = "10k"

CAUTION = (
    "Caution: the analyzer port is sensitive. Wear a grounded wrist strap, keep DC off the port "
    "(use a DC block) and never exceed the analyzer's maximum input power.",
    "A transmitting antenna radiates: keep clear of it and transmit only where authorised; "
    "local regulations and licensed practice come first.",
)


@app.command("measure")
@with_fixture_flags
def measure(
    load: Optional[str] = typer.Argument(
        None, help=f"With --simulate: the Touchstone file or bundled sample to serve "
                   f"({', '.join(SAMPLE_BANDS)}); default {DEFAULT_SIMULATED}."),
    resource: Optional[str] = typer.Option(
        None, "--resource", help="VISA resource of the analyzer, e.g. TCPIP::192.168.0.20::5025::SOCKET."),
    profile: str = typer.Option(DEFAULT_PROFILE, "--profile", help="Analyzer profile under configs/analyzers/ or a file."),
    simulate: bool = typer.Option(False, "--simulate", help="Measure a simulated analyzer on 127.0.0.1 (no hardware)."),
    band: Optional[str] = typer.Option(None, "--band", help="Band to match over, e.g. 902M:928M."),
    dut_id: Optional[str] = typer.Option(None, "--dut-id", help="Id of the unit measured (default: unit-UTC time)."),
    loop: bool = typer.Option(False, "--loop", help="Bench loop: read DUT ids from stdin, one per line, until an empty line or q."),
    store: Optional[str] = typer.Option(None, "--store", help="HDF5 results store to append each record to (created if new)."),
    save_raw: Optional[str] = typer.Option(None, "--save-touchstone", help="Folder to save each raw sweep in as .s1p."),
    lot: Optional[str] = typer.Option(None, "--lot", help="Lot id recorded with every unit."),
    start: Optional[str] = typer.Option(None, "--start", help="Sweep start, e.g. 880M (default: the band widened by half its width)."),
    stop: Optional[str] = typer.Option(None, "--stop", help="Sweep stop, e.g. 950M (default: the band widened by half its width)."),
    points: int = typer.Option(DEFAULT_POINTS, "--points", help="Points per sweep."),
    ifbw: str = typer.Option(DEFAULT_IFBW, "--ifbw", help="IF bandwidth, e.g. 10k."),
    port: Optional[int] = typer.Option(None, "--port", help="Analyzer port whose reflection is measured: 1 (S11) or 2 (S22)."),
    data_format: Optional[str] = typer.Option(None, "--format", help="Trace format: REAL,64, REAL,32 or ASCII (default: the profile's first)."),
    byte_order: Optional[str] = typer.Option(None, "--byte-order", help="Byte order of binary traces: little or big (default: the profile's first)."),
    retries: int = typer.Option(1, "--retries", help="Times a link fault (timeout, dropped connection) is recovered and retried."),
    timeout: Optional[float] = typer.Option(None, "--timeout", help="Timeout for one reply, s (default: the profile's io_timeout_s)."),
    visa_library: str = typer.Option("@py", "--visa-library", help="VISA library: @py (pyvisa-py), '' (system VISA) or a path."),
    spec_rl: Optional[float] = typer.Option(None, "--spec-rl", help="Return loss (dB) a unit must reach over the band."),
    series: Optional[str] = typer.Option(None, "--series", help="Part series: E6, E12, E24, E48, E96, E192 or ideal."),
    parts: Optional[str] = typer.Option(None, "--parts", help="Part library name under configs/parts/ or a file."),
    station: Optional[str] = typer.Option(None, "--station", help="Station file under configs/stations/ with defaults."),
    as_json: bool = typer.Option(False, "--json", help="Print each result as JSON (one object per line with --loop)."),
    fixture_flags: FixtureFlags = None,
) -> None:
    """Measure on a live analyzer: acquire, de-embed, match, show, store."""
    simulated_file, simulated_band = _simulated_load(load, simulate, resource)
    station_table = load_station(station)
    settings = build_settings(
        band=band or (None if "band" in station_table else simulated_band), spec_rl=spec_rl, series=series,
        parts=parts, fixture=fixture_flags,
        port=port, lot=lot, station=station_table)
    analyzer_profile = load_profile(profile)
    sweep = plan_sweep(analyzer_profile, settings.band_hz, start_hz=_frequency(start, "--start"),
                       stop_hz=_frequency(stop, "--stop"), points=points,
                       ifbw_hz=_option(lambda t: parse_quantity(t, "Hz", what="IF bandwidth"), ifbw, "--ifbw"),
                       port=settings.port, data_format=data_format, byte_order=byte_order)
    plan = BenchPlan(settings, sweep, Path(store) if store else None, Path(save_raw) if save_raw else None)
    plan.check()
    if loop and dut_id is not None:
        raise ConfigError("in --loop mode the DUT ids are read from standard input", where="--dut-id")
    single_id = None if loop else check_dut_id(dut_id or _default_dut_id())

    console = Console(highlight=False, soft_wrap=True)
    notes = Console(stderr=True, highlight=False, soft_wrap=True) if as_json else console
    if simulated_file is None:
        for line in CAUTION:
            notes.print(f"[yellow]{line}[/]")
    with _serving(simulated_file) as simulated_resource, _quiet_instrument_log():
        with Analyzer(simulated_resource or resource, analyzer_profile, visa_library=visa_library,
                      timeout_s=timeout, retries=retries) as analyzer:
            if not as_json:
                _print_session(console, analyzer, plan, simulated_file)
            session = BenchSession(analyzer, plan)
            if single_id is not None:
                _show(console, session.measure(single_id), as_json, detail=True)
                return
            tally = run_loop(session, read_dut_ids(sys.stdin, _prompt if sys.stdin.isatty() else None),
                             on_measured=lambda m: _show(console, m, as_json, detail=False),
                             on_failed=lambda dut, error: _show_failure(console, dut, error, as_json))
    _print_summary(notes, tally, plan)


# --- options ----------------------------------------------------------------------------

def _option(parse, text: str | None, flag: str):
    """Parse an option value (None stays None); an error names the option."""
    if text is None:
        return None
    try:
        return parse(text)
    except ConfigError as error:
        raise ConfigError(error.message, where=flag) from None


def _frequency(text: str | None, flag: str) -> float | None:
    return _option(parse_frequency, text, flag)


def _default_dut_id() -> str:
    return f"unit-{datetime.now(timezone.utc):%Y%m%dT%H%M%SZ}"


def _simulated_load(load: str | None, simulate: bool, resource: str | None) -> tuple[Path | None, str | None]:
    """(file the simulator serves, its default band) for --simulate; (None, None) for a live analyzer."""
    if not simulate:
        if load is not None:
            raise ConfigError("a LOAD is only served with --simulate", where=load)
        if not resource:
            raise ConfigError("give the analyzer's VISA resource (--resource TCPIP::HOST::5025::SOCKET), "
                              "or --simulate to try the bench flow without hardware", where="--resource")
        return None, None
    if resource:
        raise ConfigError("give either --resource (a live analyzer) or --simulate, not both", where="--resource")
    name = load or DEFAULT_SIMULATED
    for path in (Path(name), SAMPLES / name, SAMPLES / f"{name}.s1p"):
        if path.is_file():
            bundled = path.resolve().parent == SAMPLES
            return path, SAMPLE_BANDS.get(path.stem) if bundled else None
    raise InputFileError(f"no such file or bundled sample (bundled: {', '.join(SAMPLE_BANDS)})", where=name)


@contextmanager
def _serving(load: Path | None) -> Iterator[str | None]:
    """The simulated analyzer's resource while it serves ``load``; None for a live analyzer."""
    if load is None:
        yield None
        return
    with SimulatedAnalyzer(load) as simulator:
        yield simulator.resource


@contextmanager
def _quiet_instrument_log() -> Iterator[None]:
    """Keep the analyzer's per-attempt warnings off stderr (Python's last-resort handler would
    print them): a failure is reported once, naming its step; a recovered one in the result."""
    logger = logging.getLogger("instruments")
    handler = logging.NullHandler()
    logger.addHandler(handler)
    try:
        yield
    finally:
        logger.removeHandler(handler)


def _prompt() -> None:
    print("DUT id (scan or type; Enter or q to stop): ", end="", file=sys.stderr, flush=True)


# --- output -------------------------------------------------------------------------------

def measurement_json(measurement: Measurement) -> dict:
    """One measured unit, with the keys of ``matchbay match --json`` for the best solution."""
    record = measurement.record
    return {
        "dut_id": record.dut_id,
        "lot": record.lot,
        "source": record.source,
        "source_sha256": record.source_sha256,
        "acquired_at": record.acquired_at,
        "z0_ohm": record.z0_ohm,
        "band_hz": [record.band_lo_hz, record.band_hi_hz],
        "spec_rl_db": record.spec_rl_db,
        "return_loss_before_db": record.rl_before_worst_db,
        "pass_before": record.pass_before,
        "solutions": [{"elements": record.elements, "return_loss_db": record.rl_after_worst_db,
                       "return_loss_center_db": record.rl_after_center_db,
                       "delivered_fraction_min": record.delivered_fraction_min}],
        "pass_after": record.pass_after,
        "series": record.series,
        "parts": record.parts,
        "fixture": record.fixture,
        "headroom": record.headroom,
        "instrument": record.extras.get("instrument", {}),
        "record": measurement.stored_index,
        "new_record": measurement.new_record,
        "raw_touchstone": None if measurement.touchstone is None else str(measurement.touchstone),
    }


def _verdict(passed: bool) -> str:
    return "[bold green]PASS[/]" if passed else "[bold red]FAIL[/]"


def _rl(rl_db: float) -> str:
    return "> 60 dB" if rl_db > 60 else f"{rl_db:.1f} dB"


def _print_session(console: Console, analyzer: Analyzer, plan: BenchPlan, simulated: Path | None) -> None:
    sweep, settings = plan.sweep, plan.settings
    lo, hi = settings.band_hz
    what = f"simulated analyzer serving {simulated}" if simulated else analyzer.resource
    console.print(f"[bold]{escape(analyzer.identity)}[/] ({escape(what)}), profile {escape(analyzer.profile.name)}")
    console.print(f"sweep {format_si(sweep.start_hz, 'Hz', 4)} – {format_si(sweep.stop_hz, 'Hz', 4)}, "
                  f"{sweep.points} points, IFBW {format_si(sweep.ifbw_hz, 'Hz')}, {sweep.parameter}, "
                  f"{sweep.data_format}; match over {format_si(lo, 'Hz', 4)} – {format_si(hi, 'Hz', 4)}, "
                  f"spec {settings.spec_rl_db:g} dB, {settings.series} parts ({settings.parts.name})")
    for line in settings.fixture.summary():
        console.print(f"de-embedding: {escape(line)}")
    if plan.store_path is not None:
        console.print(f"store: {escape(str(plan.store_path))}")


def _show(console: Console, measurement: Measurement, as_json: bool, *, detail: bool) -> None:
    """A measured unit: JSON, or its verdict, suggested network and where it was stored."""
    if as_json:
        print(json.dumps(measurement_json(measurement), indent=2 if detail else None))
        return
    record = measurement.record
    spec = f"spec {record.spec_rl_db:g} dB"
    console.print(f"[bold]{escape(record.dut_id)}[/]  as measured: RL worst {_rl(record.rl_before_worst_db)} "
                  f"→ {_verdict(record.pass_before)} ({spec})")
    network = (network_text([Element.from_dict(e) for e in record.elements]) if record.elements
               else "no network needed")
    console.print(f"  suggested ({record.series}): {network} → RL worst {_rl(record.rl_after_worst_db)}, "
                  f"{_verdict(record.pass_after)}")
    if detail:
        console.print(f"  RL at the band centre {_rl(record.rl_before_center_db)} before, "
                      f"{_rl(record.rl_after_center_db)} after; power to antenna "
                      f"{100 * record.delivered_fraction_min:.1f} % or more over the band")
        for step in record.fixture:
            console.print(f"  de-embedded: {escape(summarize_step(step))}")
        if record.headroom.get("verdict"):
            console.print(f"  headroom: {escape(record.headroom['verdict'])}")
    caution = passivity_warning(Sweep(record.freq_hz, record.s11_dut))
    if caution:
        console.print(f"  [yellow]warning: {caution}[/]")
    if measurement.attempts > 1:
        console.print(f"  [yellow]a link fault was recovered (attempt {measurement.attempts})[/]")
    places = []
    if measurement.stored_index is not None:
        places.append(f"stored as record #{measurement.stored_index}" if measurement.new_record else
                      f"[yellow]bit-identical to stored record #{measurement.stored_index}, not stored again "
                      f"(did the analyzer sweep?)[/]")
    if measurement.touchstone is not None:
        places.append(f"raw sweep {escape(str(measurement.touchstone))}")
    if places:
        console.print("  " + "; ".join(places))


def _show_failure(console: Console, dut_id: str, error: MatchbayError, as_json: bool) -> None:
    """A failed measurement in the loop: one line on stderr (and a JSON line with --json)."""
    print(f"matchbay: DUT {dut_id}: {error} (nothing stored)", file=sys.stderr)
    if as_json:
        print(json.dumps({"dut_id": dut_id, "error": str(error)}))
    else:
        console.print(f"[bold]{escape(dut_id)}[/]  [bold red]not measured[/]: {escape(str(error))}")


def _print_summary(console: Console, tally: SessionTally, plan: BenchPlan) -> None:
    ended = "interrupted" if tally.interrupted else "ended"
    text = (f"session {ended}: {tally.measured} unit{'s' if tally.measured != 1 else ''} measured, "
            f"{tally.passed} passed, {tally.failed} failed as measured "
            f"(spec {plan.settings.spec_rl_db:g} dB); {tally.pass_matched} reach the spec with the "
            f"suggested network")
    if tally.errors:
        text += f"; {tally.errors} measurement{'s' if tally.errors != 1 else ''} failed"
    if plan.store_path is not None:
        text += f"; {tally.stored} stored in {escape(str(plan.store_path))}"
    console.print(text)
