"""The lot job end to end: `matchbay lot`, `matchbay demo`, reruns, the Dask path.

Checks against the world outside: the stored predicted return loss is recomputed with a
scikit-rf cascade of lumped elements (skrf.media) onto the stored de-embedded load; the
shared network's reported yield is recomputed from the stored per-unit data.
"""

from __future__ import annotations

import shutil
from pathlib import Path

import numpy as np
import pytest
import skrf
from skrf.media import DefinedGammaZ0

from pipeline.cli import main
from pipeline.elements import Element
from pipeline.lot import common_band_grid, yield_at_spec
from pipeline.match import predicted_gamma
from pipeline.metrics import return_loss_db
from pipeline.store import ResultsStore, units_frame

SAMPLE_LOT = Path(__file__).resolve().parents[1] / "sample_measurements" / "lot-915"
BAND = (902e6, 928e6)


@pytest.fixture(scope="module")
def small_lot(tmp_path_factory) -> Path:
    """16 units of the bundled lot (two of them detuned) plus its cut-off file."""
    folder = tmp_path_factory.mktemp("lot") / "line-7"
    folder.mkdir()
    names = [f"LKS-{i:04d}.s1p" for i in (1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 27, 37)]
    for name in names:
        shutil.copy(SAMPLE_LOT / name, folder / name)
    return folder


@pytest.fixture(scope="module")
def stored_lot(small_lot, tmp_path_factory):
    store = tmp_path_factory.mktemp("store") / "lot.h5"
    code = main(["lot", str(small_lot), "--band", "902M:928M", "--store", str(store),
                 "--parts", "generic-0402", "--workers", "2", "--mc-trials", "500"])
    assert code == 0
    return store


def _skrf_worst_rl(elements, freq_hz, z_load, z0=50.0) -> float:
    """Worst RL over freq_hz of the ladder built from skrf lumped elements (R for loss)."""
    freq = skrf.Frequency.from_f(freq_hz, unit="Hz")
    media = DefinedGammaZ0(frequency=freq, z0=z0)
    load = media.load(((z_load - z0) / (z_load + z0)).reshape(-1, 1, 1))
    network = None
    for e in elements:                       # source -> load
        z = e.impedance(freq_hz)             # the part with its model, as a 2-terminal Z
        # a two-terminal impedance as a series 2-port, or shunted to ground
        series = skrf.Network(frequency=freq, z0=z0,
                              s=_series_s(z, z0)) if e.position == "series" else None
        part = series if series is not None else skrf.Network(frequency=freq, z0=z0, s=_shunt_s(z, z0))
        network = part if network is None else network ** part
    gamma = (network ** load).s[:, 0, 0] if network is not None else load.s[:, 0, 0]
    return float(np.min(return_loss_db(gamma)))


def _series_s(z, z0):
    """S of a series impedance 2-port (Pozar Table 4.2 via ABCD [[1, Z], [0, 1]])."""
    s = np.empty((z.size, 2, 2), complex)
    d = z + 2 * z0
    s[:, 0, 0] = s[:, 1, 1] = z / d
    s[:, 0, 1] = s[:, 1, 0] = 2 * z0 / d
    return s


def _shunt_s(z, z0):
    """S of a shunt impedance 2-port (ABCD [[1, 0], [1/Z, 1]])."""
    s = np.empty((z.size, 2, 2), complex)
    d = 2 * z + z0
    s[:, 0, 0] = s[:, 1, 1] = -z0 / d
    s[:, 0, 1] = s[:, 1, 0] = 2 * z / d
    return s


def test_series_and_shunt_helpers_agree_with_skrf_media():
    """The two helper 2-ports equal scikit-rf's own lumped inductor / shunt capacitor."""
    f = np.linspace(1e9, 2e9, 5)
    media = DefinedGammaZ0(frequency=skrf.Frequency.from_f(f, unit="Hz"), z0=50.0)
    assert np.allclose(_series_s(1j * 2 * np.pi * f * 5e-9, 50.0), media.inductor(5e-9).s, atol=1e-12)
    assert np.allclose(_shunt_s(1 / (1j * 2 * np.pi * f * 2e-12), 50.0), media.shunt_capacitor(2e-12).s,
                       atol=1e-12)


def test_lot_stores_every_good_unit_and_logs_the_bad_file(stored_lot, capsys):
    frame = units_frame(stored_lot)
    assert len(frame) == 15
    assert set(frame["lot"]) == {"line-7"}
    with ResultsStore(stored_lot, mode="r") as store:
        failures = store.failures_frame()
        summary = store.get_lot("line-7")
    assert len(failures) == 1 and "LKS-0037.s1p:244" in failures["reason"].iloc[0]
    assert summary["n_units"] == 15 and summary["n_failed_files"] == 1


def test_stored_predicted_return_loss_matches_a_scikit_rf_cascade(stored_lot):
    """Independent recomputation (scikit-rf) of the stored after-match worst RL, 0.01 dB."""
    with ResultsStore(stored_lot, mode="r") as store:
        records = store.get_units(store.find()[:6])
    for r in records:
        elements = [Element.from_dict(e) for e in r.elements]
        inside = (r.freq_hz >= r.band_lo_hz) & (r.freq_hz <= r.band_hi_hz)
        z = r.z0_ohm * (1 + r.s11_dut) / (1 - r.s11_dut)
        worst = _skrf_worst_rl(elements, r.freq_hz[inside], z[inside])
        assert worst == pytest.approx(float(np.min(return_loss_db(r.s11_matched[inside]))), abs=0.01)
        assert worst == pytest.approx(r.rl_after_worst_db, abs=0.05)   # edges interpolated in the match


def test_shared_yield_is_recomputed_exactly_from_the_stored_units(stored_lot):
    with ResultsStore(stored_lot, mode="r") as store:
        summary = store.get_lot("line-7")
        records = store.get_units(store.find(lot="line-7"))
    shared = summary["shared"]
    elements = [Element.from_dict(e) for e in shared["elements"]]
    data = common_band_grid([(r.dut_id, r.freq_hz, r.s11_dut) for r in records], BAND, z0=50.0)
    worst = np.min(return_loss_db(predicted_gamma(elements, data.freq_hz, data.z_load, 50.0)), axis=-1)
    assert yield_at_spec(worst, 10.0) == shared["yield_fraction"]
    failing = {u for u, w in zip(data.unit_ids, worst) if w < 10.0}
    assert failing == set(shared["failing_unit_ids"])
    assert "LKS-0027" in failing                   # a detuned unit of the sample lot


def test_rerun_stores_nothing_twice(stored_lot, small_lot, capsys):
    before = len(units_frame(stored_lot))
    code = main(["lot", str(small_lot), "--band", "902M:928M", "--store", str(stored_lot),
                 "--parts", "generic-0402", "--workers", "1", "--mc-trials", "500"])
    assert code == 0
    assert "0 stored, 0 failed, 16 already in the store" in capsys.readouterr().out
    assert len(units_frame(stored_lot)) == before
    with ResultsStore(stored_lot, mode="r") as store:
        assert len(store.failures_frame()) == 1


def test_bad_arguments_give_one_line_and_status_2(tmp_path, capsys):
    store = tmp_path / "s.h5"
    assert main(["lot", str(tmp_path / "missing"), "--band", "902M:928M", "--store", str(store)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "missing" in err and not store.exists()
    assert main(["lot", str(SAMPLE_LOT), "--band", "928M:902M", "--store", str(store)]) == 2
    assert "band" in capsys.readouterr().err and not store.exists()


def test_demo_runs_the_lot_job(tmp_path, capsys):
    assert main(["demo", "--out", str(tmp_path / "demo"), "--workers", "1"]) == 0
    out = capsys.readouterr().out
    assert "shared network" in out and "LKS-0037" in out
    assert len(units_frame(tmp_path / "demo" / "demo-lot.h5")) == 63


@pytest.mark.slow
def test_a_dask_cluster_gives_the_same_store_as_the_local_run(small_lot, stored_lot, tmp_path):
    distributed = pytest.importorskip("distributed")
    store = tmp_path / "dask.h5"
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster:
        code = main(["lot", str(small_lot), "--band", "902M:928M", "--store", str(store),
                     "--parts", "generic-0402", "--cluster", cluster.scheduler_address,
                     "--batch-size", "4", "--mc-trials", "500"])
    assert code == 0
    columns = ["dut_id", "source_sha256", "settings_hash", "topology", "elements",
               "rl_before_worst_db", "rl_after_worst_db", "rl_after_center_db", "q_estimate"]
    local = units_frame(stored_lot).sort_values("dut_id")[columns].reset_index(drop=True)
    remote = units_frame(store).sort_values("dut_id")[columns].reset_index(drop=True)
    assert local.equals(remote)
    with ResultsStore(stored_lot, mode="r") as a, ResultsStore(store, mode="r") as b:
        assert a.get_lot("line-7")["shared"] == b.get_lot("line-7")["shared"]


def test_results_list_failing_names_the_units_the_shared_network_leaves_failing(stored_lot, capsys):
    with ResultsStore(stored_lot, mode="r") as store:
        failing = store.get_lot("line-7")["shared"]["failing_unit_ids"]
    assert main(["results", "list", str(stored_lot), "--failing"]) == 0
    out = capsys.readouterr().out
    assert f"{len(failing)} unit(s)" in out and all(dut in out for dut in failing)
    assert "LKS-0001" not in out
