"""``matchbay watch``: process every Touchstone file that lands in a folder, until stopped.

Parses options, opens the store, runs :class:`pipeline.watch.FolderWatcher`, shows a live
status line (on a terminal) and timestamped logs on stderr, and prints a summary on
stdout at the end. SIGINT and SIGTERM finish the files in hand, close the store and exit 0.
"""

from __future__ import annotations

import logging
import signal
import sys
import threading
import time
from contextlib import contextmanager
from typing import Optional

import typer
from rich.console import Console
from rich.live import Live
from rich.logging import RichHandler
from rich.text import Text

from pipeline.cli import app
from pipeline.cli.options import (FixtureFlags, build_settings, load_station,
                                  with_fixture_flags)
from pipeline.errors import ConfigError
from pipeline.watch import FolderWatcher, WatchOptions, WatchStatus

STATUS_LOG_INTERVAL_S = 30.0     # without a terminal, the status goes to the log this often
STORE_OPEN_WAIT_S = 60.0         # how long to wait for a reader that holds the store to let go


@app.command("watch")
@with_fixture_flags
def watch(
    folder: Optional[str] = typer.Argument(
        None, help="Folder to watch, recursively (default: watch.folder of the station file)."),
    store: Optional[str] = typer.Option(
        None, help="HDF5 results store, created if new (default: watch.store of the station file)."),
    band: Optional[str] = typer.Option(None, help="Band to match over, e.g. 902M:928M."),
    spec_rl: Optional[float] = typer.Option(None, help="Return loss (dB) a unit must reach over the band."),
    series: Optional[str] = typer.Option(None, help="Part series: E6, E12, E24, E48, E96, E192 or ideal."),
    parts: Optional[str] = typer.Option(None, help="Part library name under configs/parts/ or a file."),
    fixture_flags: FixtureFlags = None,
    z0: Optional[float] = typer.Option(None, help="Reference impedance, ohm."),
    port: Optional[int] = typer.Option(None, help="Port whose reflection is matched in N-port files."),
    lot: Optional[str] = typer.Option(None, help="Lot id recorded with every unit."),
    config: Optional[str] = typer.Option(
        None, "--config", "--station", help="Station file (TOML) under configs/stations/ or a path."),
    done: Optional[str] = typer.Option(
        None, help="Folder for processed files, relative to the watched folder (default: done)."),
    rejected: Optional[str] = typer.Option(
        None, help="Folder for bad files and their .reason.txt (default: rejected)."),
    keep: Optional[bool] = typer.Option(
        None, "--keep/--move", help="Leave processed files in place instead of moving them to done."),
    stable: Optional[float] = typer.Option(
        None, help="Seconds a file's size and mtime must stay unchanged to count as complete (default 0.5)."),
    trust_close: Optional[bool] = typer.Option(
        None, "--trust-close/--no-trust-close",
        help="A close after writing means complete (off: a writer that reopens between pieces)."),
    polling: Optional[bool] = typer.Option(
        None, "--polling/--native", help="Poll the folder (network shares) instead of native events."),
    poll_interval: Optional[float] = typer.Option(None, help="Polling interval, seconds (default 2)."),
    rescan: Optional[float] = typer.Option(
        None, help="Full rescan of the folder every N seconds (default 10)."),
    workers: Optional[int] = typer.Option(
        None, help="Worker processes; 0: in this process (default: all cores)."),
    once: bool = typer.Option(False, "--once", help="Process what is in the folder, then exit."),
):
    """Watch a folder: de-embed, match and store every sweep file that lands there."""
    station = load_station(config)
    where = station.get("_path", "[watch]")
    table = station.get("watch", {})
    if not isinstance(table, dict):
        raise ConfigError("must be a table ([watch])", where=where, key="watch")
    folder = folder or table.get("folder")
    store = store or table.get("store")
    if not folder:
        raise ConfigError("a folder to watch is required (FOLDER, or folder in the station's [watch])",
                          where="FOLDER")
    if not store:
        raise ConfigError("a results store is required (--store FILE.h5, or store in the station's [watch])",
                          where="--store")
    options = WatchOptions.build(
        str(folder), table, where=where, done_dir=done, rejected_dir=rejected, keep_processed=keep,
        stable_s=stable, trust_close=trust_close, polling=polling, poll_interval_s=poll_interval,
        rescan_s=rescan, workers=workers)
    settings = build_settings(band=band, z0=z0, spec_rl=spec_rl, series=series, parts=parts,
                              fixture=fixture_flags,
                              port=port, lot=lot, station=station)
    status = run_watch(options, settings, str(store), once=once)
    print(summary_line(status))


def run_watch(options: WatchOptions, settings, store_path: str, *, once: bool) -> WatchStatus:
    """Open the store and run the watcher with logging, a status line and signal handling."""
    from pipeline.store import ResultsStore

    console = Console(stderr=True)
    with _logging_to(console), _status_display(console) as show:
        logging.getLogger("pipeline.watch").info(
            "opening the store %s (a reader that opened it first delays this, up to %g s)",
            store_path, STORE_OPEN_WAIT_S)
        with ResultsStore(store_path, mode="a", timeout_s=STORE_OPEN_WAIT_S) as store:
            watcher = FolderWatcher(options, settings, store, on_status=show)
            with _stop_on_signals(watcher):
                return watcher.run(once=once)


def summary_line(status: WatchStatus) -> str:
    text = (f"done {status.done} ({status.stored} stored, {status.already_stored} already stored), "
            f"rejected {status.rejected}")
    if status.vanished:
        text += f", removed before read {status.vanished}"
    if status.left_waiting:
        text += f", still changing (left for the next run) {status.left_waiting}"
    return text


@contextmanager
def _logging_to(console: Console):
    """Timestamped INFO logs of matchbay (and watchdog warnings) on stderr, for the command's run."""
    if console.is_terminal:
        handler: logging.Handler = RichHandler(console=console, show_path=False,
                                               log_time_format="[%Y-%m-%d %H:%M:%S]")
    else:
        handler = logging.StreamHandler(sys.stderr)
        handler.setFormatter(logging.Formatter("%(asctime)s %(levelname)s %(message)s"))
    root, ours = logging.getLogger(), logging.getLogger("pipeline")
    saved = root.level, ours.level
    root.addHandler(handler)
    root.setLevel(logging.WARNING)
    ours.setLevel(logging.INFO)
    try:
        yield
    finally:
        root.removeHandler(handler)
        root.setLevel(saved[0])
        ours.setLevel(saved[1])


@contextmanager
def _status_display(console: Console):
    """A callback showing the status: a live line on a terminal, else a log line now and then."""
    if console.is_terminal:
        with Live(Text(""), console=console, transient=True, refresh_per_second=4) as live:
            shown = [""]

            def show(status: WatchStatus) -> None:
                line = status.line()
                if line != shown[0]:
                    shown[0] = line
                    live.update(Text(line, no_wrap=True, overflow="ellipsis"))

            yield show
        return
    log = logging.getLogger("pipeline.watch")
    last = {"line": "", "at": 0.0}

    def show(status: WatchStatus) -> None:
        line, now = status.line(), time.monotonic()
        if line != last["line"] and now - last["at"] >= STATUS_LOG_INTERVAL_S:
            last.update(line=line, at=now)
            log.info("status: %s", line)

    yield show


@contextmanager
def _stop_on_signals(watcher: FolderWatcher):
    """SIGINT/SIGTERM: finish the files in hand, then return (exit status 0)."""
    def stop(signum, frame):
        watcher.request_stop()

    if threading.current_thread() is not threading.main_thread():
        yield                        # signals reach the main thread only
        return
    saved = {sig: signal.signal(sig, stop) for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield
    finally:
        for sig, handler in saved.items():
            signal.signal(sig, handler)
