"""Many files through the per-unit step: discovery, batching, executors, one writer.

The work per file (parse, de-embed, match) is a few milliseconds, close to what one
task costs any executor, so files travel in batches (``batch_size``, default 50, about
100-150 ms of work), and a worker processes its batch together: the units measured on
one frequency grid share the array evaluations of the band match (measured on a 2-core
machine: 2.6-2.9 ms per unit with the read, against 26 ms one by one). Workers only
compute and return records; the calling process is the single writer of the HDF5 store
(HDF5 allows one writer).

Executors are anything with the ``concurrent.futures.Executor`` interface: a local
process pool by default, or a Dask distributed cluster's ``Client.get_executor()``.
"""

from __future__ import annotations

import glob
import os
from concurrent.futures import Executor, ProcessPoolExecutor, as_completed
from contextlib import contextmanager
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterable, Iterator

from pipeline.errors import ConfigError, MatchbayError

TOUCHSTONE_SUFFIXES = (".ts",) + tuple(f".s{n}p" for n in range(1, 10))


@dataclass(frozen=True)
class Outcome:
    """What became of one file: a record to store, or the reason it failed."""

    path: str
    sha256: str
    record: object | None = None      # pipeline.store.UnitRecord
    reason: str = ""


def is_touchstone(path: str | Path) -> bool:
    """A file name that Touchstone readers accept (.s1p ... .s9p, .ts; any case)."""
    return Path(path).suffix.lower() in TOUCHSTONE_SUFFIXES


def discover(paths: Iterable[str]) -> list[str]:
    """Touchstone files named by files, folders (recursively) and glob patterns; sorted, unique."""
    found: set[str] = set()
    for item in paths:
        matches = glob.glob(item, recursive=True) if glob.has_magic(item) else [item]
        if not matches:
            raise ConfigError("no file matches this pattern", where=item)
        for match in matches:
            p = Path(match)
            if p.is_dir():
                found.update(str(f) for f in p.rglob("*") if f.is_file() and is_touchstone(f))
            elif p.exists():
                found.add(str(p))
            else:
                raise ConfigError("no such file or folder", where=item)
    return sorted(found)


def process_batch(paths: list[str], settings) -> list[Outcome]:
    """Worker task: process a batch of files; a bad file becomes a failed Outcome.

    Every file is read first; the readable ones are then processed together
    (:func:`pipeline.process.process_sweeps`: the units of one frequency grid are matched
    in the same array evaluations).
    """
    from pipeline.process import process_sweeps, read_unit

    outcomes: list[Outcome | None] = [None] * len(paths)
    read, sweeps = [], []
    for i, path in enumerate(paths):
        try:
            sweeps.append(read_unit(path, settings))
            read.append(i)
        except MatchbayError as error:
            outcomes[i] = _unreadable(path, error)
    for i, sweep, result in zip(read, sweeps, process_sweeps(sweeps, settings)):
        sha = sweep.provenance.source_sha256          # the hash of the bytes that were parsed
        if isinstance(result, MatchbayError):
            outcomes[i] = Outcome(paths[i], sha, reason=str(result))
        else:
            outcomes[i] = Outcome(paths[i], sha, record=result)
    return outcomes


def _unreadable(path: str, error: MatchbayError) -> Outcome:
    """The failed Outcome of a file that could not be read as a sweep."""
    from pipeline.acquire import sha256_file

    try:
        sha = sha256_file(path)
    except OSError as os_error:
        return Outcome(path, "", reason=f"cannot read: {os_error.strerror or os_error}")
    return Outcome(path, sha, reason=str(error))


def batches(items: list, size: int) -> Iterator[list]:
    for start in range(0, len(items), size):
        yield items[start:start + size]


@contextmanager
def make_executor(workers: int | None = None, cluster: str | None = None):
    """A process pool on this machine (``workers``, default all cores) or a Dask cluster."""
    if cluster:
        try:
            from distributed import Client
        except ImportError:
            raise ConfigError("needs the optional Dask extra: pip install 'matchbay[cluster]'",
                              where="--cluster") from None
        try:
            client = Client(cluster, timeout="10s")
        except (OSError, TimeoutError) as error:
            raise ConfigError(f"cannot reach the Dask scheduler: {error}", where=cluster) from None
        try:
            yield client.get_executor()
        finally:
            client.close()
        return
    n = workers or os.cpu_count() or 1
    if n <= 1:
        yield None                          # in-process: no pool to start
        return
    with ProcessPoolExecutor(max_workers=n) as pool:
        yield pool


def run(paths: list[str], settings, executor: Executor | None, *, batch_size: int = 50,
        on_outcomes: Callable[[list[Outcome]], None]) -> None:
    """Process ``paths`` in batches on ``executor`` (None: in this process).

    ``on_outcomes`` is called in this process with each finished batch, in completion
    order: it is where the single writer stores records and failures.
    """
    if executor is None:
        for batch in batches(paths, batch_size):
            on_outcomes(process_batch(batch, settings))
        return
    futures = [executor.submit(process_batch, batch, settings) for batch in batches(paths, batch_size)]
    for future in as_completed(futures):
        on_outcomes(future.result())
