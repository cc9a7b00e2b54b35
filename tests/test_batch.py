"""Tests of pipeline.batch: a worker's batch of real files, read and processed together.

The files are real Touchstone files: copies of sample_measurements/lot-915 (invented
915 MHz antennas written by scikit-rf, one of them cut short by an interrupted transfer)
plus units on a second frequency grid written here with scikit-rf. The reference for
every file is :func:`pipeline.process.process_file` on it alone.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest
import skrf

from pipeline import batch
from pipeline.acquire import sha256_file
from pipeline.errors import MatchbayError
from pipeline.parts import load_parts
from pipeline.process import Settings, process_file
from test_process import SAMPLES, assert_same_record, unit

LOT = Path(__file__).resolve().parents[1] / "sample_measurements" / "lot-915"
SETTINGS = Settings(band_hz=(902e6, 928e6), series="E24", parts=load_parts("generic-0402"), lot="t")


@pytest.fixture(scope="module")
def files(tmp_path_factory) -> list[str]:
    """12 lot files (LKS-0037 is the cut-off one), 3 files on another grid, 1 missing name."""
    folder = tmp_path_factory.mktemp("batch")
    paths = []
    for source in sorted(LOT.glob("*.s1p"))[30:42]:
        paths.append(str(shutil.copy(source, folder / source.name)))
    grid = skrf.Frequency.from_f(np.linspace(850e6, 1000e6, 151), unit="Hz")
    for i in range(3):
        network = SAMPLES.one_port(grid, unit(grid.f, 100 + i).s11, "batch test unit (synthetic)")
        paths.append(str(SAMPLES.write(network, folder / f"other-{i}.s1p")))
    paths.insert(5, str(folder / "never-written.s1p"))
    return paths


def test_a_batch_gives_each_file_what_it_gets_alone(files):
    outcomes = batch.process_batch(files, SETTINGS)
    assert [o.path for o in outcomes] == files
    failed = {Path(o.path).name: o for o in outcomes if o.record is None}
    assert set(failed) == {"never-written.s1p", "LKS-0037.s1p"}
    assert failed["never-written.s1p"].sha256 == ""
    assert failed["never-written.s1p"].reason == "cannot read: No such file or directory"
    cut = failed["LKS-0037.s1p"]
    assert cut.sha256 == sha256_file(cut.path)
    with pytest.raises(MatchbayError) as caught:
        process_file(cut.path, SETTINGS)
    assert cut.reason == str(caught.value)
    for o in outcomes:
        if o.record is not None:
            assert o.sha256 == sha256_file(o.path) == o.record.source_sha256
            assert_same_record(o.record, process_file(o.path, SETTINGS))
    assert {o.record.freq_hz.size for o in outcomes if o.record is not None} == {401, 151}


def test_run_on_a_process_pool_matches_in_process(files):
    by_pool, in_process = [], []
    with batch.make_executor(2) as pool:
        batch.run(files, SETTINGS, pool, batch_size=6, on_outcomes=by_pool.extend)
    batch.run(files, SETTINGS, None, batch_size=6, on_outcomes=in_process.extend)
    by_pool.sort(key=lambda o: files.index(o.path))
    assert [(o.path, o.sha256, o.reason) for o in by_pool] == [(o.path, o.sha256, o.reason) for o in in_process]
    for a, b in zip(by_pool, in_process):
        if a.record is not None:
            assert_same_record(a.record, b.record)
