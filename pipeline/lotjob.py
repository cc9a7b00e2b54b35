"""The lot job: every file of a lot into the store, then one network for the whole line.

Shell code (files, the store, executors) around the functional core in
:mod:`pipeline.lot`. :func:`process_lot` stores every unit (skipping files already
stored with the same settings) and every failure; :func:`analyse_lot` reads the lot back
from the store, picks the shared standard-valued network, runs the tolerance Monte Carlo,
stores the lot summary and returns it as a JSON-ready dict.
"""

from __future__ import annotations

from typing import Callable

import numpy as np

from pipeline import batch
from pipeline.acquire import sha256_file
from pipeline.headroom import summarise_lot
from pipeline.lot import common_band_grid, shared_network, tolerance_yield, yield_at_spec
from pipeline.store import ResultsStore


def pending_files(store: ResultsStore, paths: list[str], digest: str) -> tuple[list[str], int]:
    """Files not yet stored (nor failed) with these settings, and how many were skipped."""
    todo, skipped = [], 0
    for path in paths:
        try:
            sha = sha256_file(path)
        except OSError:
            todo.append(path)             # the worker reports the reason
            continue
        if store.contains(sha, digest) or store.has_failure(sha, digest):
            skipped += 1
        else:
            todo.append(path)
    return todo, skipped


def process_lot(store: ResultsStore, paths: list[str], settings, *, workers=None, cluster=None,
                batch_size: int = 50, progress: Callable[[int], None] | None = None) -> dict:
    """Store every unit of ``paths``; returns counts {stored, failed, skipped}."""
    digest = settings.digest()
    todo, skipped = pending_files(store, paths, digest)
    counts = {"stored": 0, "failed": 0, "skipped": skipped}

    def write(outcomes):
        records = [o.record for o in outcomes if o.record is not None]
        if records:
            store.append_many(records)
        for o in outcomes:
            if o.record is None:
                store.append_failure(o.path, o.sha256, o.reason, lot=settings.lot, settings_hash=digest)
        counts["stored"] += len(records)
        counts["failed"] += len(outcomes) - len(records)
        if progress:
            progress(len(outcomes))

    with batch.make_executor(workers, cluster) as executor:
        batch.run(todo, settings, executor, batch_size=batch_size, on_outcomes=write)
    return counts


def lot_records(store: ResultsStore, lot: str, settings) -> list:
    """The lot's latest record per DUT made with these settings, sorted by DUT id (so the
    lot analysis does not depend on the order in which workers finished)."""
    digest = settings.digest()
    records = [r for r in store.get_units(store.find(lot=lot)) if r.settings_hash == digest]
    return sorted(records, key=lambda r: r.dut_id)


def analyse_lot(store: ResultsStore, lot: str, settings, *, mc_trials: int = 2000,
                seed: int = 0) -> dict:
    """Shared network, its yield and tolerance yield for ``lot``; stored and returned."""
    records = lot_records(store, lot, settings)
    failures = store.failures_frame(lot=lot)
    summary = {
        "lot": lot,
        "settings": settings.as_dict(),
        "n_units": len(records),
        "n_failed_files": int(len(failures)),
        "failures": [{"source": s, "reason": r} for s, r in zip(failures["source"], failures["reason"])],
    }
    if not records:
        return summary
    spec = settings.spec_rl_db
    before = np.array([r.rl_before_worst_db for r in records])
    after = np.array([r.rl_after_worst_db for r in records])
    summary.update({
        "rl_before_median_db": float(np.median(before)), "rl_before_worst_db": float(np.min(before)),
        "rl_after_median_db": float(np.median(after)), "rl_after_worst_db": float(np.min(after)),
        "yield_before": yield_at_spec(before, spec), "yield_after_own": yield_at_spec(after, spec),
        "headroom": summarise_lot(r.headroom for r in records),
    })
    data = common_band_grid([(r.dut_id, r.freq_hz, r.s11_dut) for r in records],
                            settings.band_hz, z0=settings.z0_ohm)
    shared = shared_network(data, spec, series=settings.series, parts=settings.parts)
    tolerance = tolerance_yield(data, shared.elements, spec, settings.parts, n_trials=mc_trials, seed=seed)
    summary["shared"] = shared.as_dict()
    summary["tolerance"] = tolerance.as_dict()
    store.put_lot(lot, summary)
    return summary
