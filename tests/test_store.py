"""The HDF5 results store (pipeline.store) and ``matchbay results``.

Real HDF5 files in tmp_path, real writer subprocesses for the crash-mark and
concurrent-reader cases (the SIGKILL loop is in test_store_crash.py). Check values come
from their definitions: SHA-256 of sorted compact JSON (hashlib), return loss
-20 log10|Gamma| (pipeline.metrics, Pozar 4th ed. Sec. 2.3), the CSV columns of
/work/shared/interfaces.md.
"""

from __future__ import annotations

import csv
import hashlib
import json
import os
import signal
import subprocess
import sys
import textwrap
import threading
import time
import zlib
from datetime import datetime, timedelta, timezone
from pathlib import Path

import h5py
import numpy as np
import pandas as pd
import pytest

from pipeline import metrics
from pipeline.cli import main
from pipeline.errors import StoreError
from pipeline.process import Settings, process_file
from pipeline.store import (HEADROOM_COLUMNS, METRIC_COLUMNS, ResultsStore, UnitRecord,
                            settings_hash, units_frame)

REPO = Path(__file__).resolve().parents[1]
SAMPLE = REPO / "sample_measurements" / "larkspur_915.s1p"
INTERFACE_CSV_COLUMNS = ["dut_id", "lot", "source", "source_sha256", "band_lo_hz", "band_hi_hz",
                         "return_loss_before_db", "return_loss_after_db", "elements"]


def make_record(i: int, *, lot: str = "lot-A", points: int = 41, sha: str | None = None,
                dut_id: str | None = None) -> UnitRecord:
    """An invented unit: a series-RLC antenna whose resonance moves with ``i``."""
    freq = np.linspace(880e6, 950e6, points)
    w, w0 = 2 * np.pi * freq, 2 * np.pi * (905e6 + 1e6 * i)
    l_s = 5 * 25.0 / w0
    z = 25.0 + 1j * w * l_s + 1 / (1j * w / (w0 ** 2 * l_s))
    s11 = (z - 50) / (z + 50)
    matched = s11 * 0.1
    rl_before, rl_after = metrics.return_loss_db(s11), metrics.return_loss_db(matched)
    return UnitRecord(
        dut_id=dut_id or f"A{i:04d}", lot=lot, serial=f"SN-{i}", source=f"/lots/{lot}/A{i:04d}.s1p",
        source_sha256=sha or hashlib.sha256(f"{lot}/{i}".encode()).hexdigest(),
        settings_hash=settings_hash({"band_hz": [902e6, 928e6]}),
        acquired_at="2026-05-09T07:35:25+00:00", config={"band_hz": [902e6, 928e6], "z0_ohm": 50.0},
        fixture=[{"type": "port_extension", "delay_s": 8.5e-11}],
        parts={"name": "generic-0402", "inductor": {"q": 35.0}}, series="E24",
        freq_hz=freq, s11_raw=s11 * 0.98, s11_dut=s11, s11_matched=matched,
        elements=[{"position": "shunt", "kind": "capacitor", "value": 3.3e-12},
                  {"position": "series", "kind": "inductor", "value": 1.2e-8, "q": 35.0,
                   "q_ref_hz": 1e9}],
        topology="shunt-C, series-L", band_lo_hz=902e6, band_hi_hz=928e6, z0_ohm=50.0,
        spec_rl_db=10.0, rl_before_worst_db=float(rl_before.min()),
        rl_before_center_db=float(rl_before[points // 2]), rl_after_worst_db=float(rl_after.min()),
        rl_after_center_db=float(rl_after[points // 2]), bw_before_hz=1e6 * i, bw_after_hz=3e7,
        delivered_fraction_min=0.95,
        headroom={"q_estimate": 5.0 + i, "rl_bound_db": 30.0, "headroom_db": None, "verdict": "room"},
        extras={"station": "bench-2"})


@pytest.fixture
def store_path(tmp_path):
    return tmp_path / "results.h5"


# --------------------------------------------------------------------------- records

def test_a_stored_unit_reads_back_field_for_field(store_path):
    record = make_record(3)
    with ResultsStore(store_path) as store:
        index = store.append(record)
    with ResultsStore(store_path, mode="r") as store:
        back = store.get_unit(index)
    assert (back.index, back.replaces) == (0, -1)
    assert back.acquired_at == "2026-05-09T07:35:25+00:00"
    for name in ("dut_id", "lot", "serial", "source", "source_sha256", "settings_hash",
                 "tool_version", "config", "fixture", "parts", "series",
                 "elements", "topology", "headroom", "extras") + METRIC_COLUMNS:
        assert getattr(back, name) == getattr(record, name), name
    for name in ("freq_hz", "s11_raw", "s11_dut", "s11_matched"):
        np.testing.assert_array_equal(getattr(back, name), getattr(record, name))
    processed = datetime.fromisoformat(back.processed_at)        # filled in by the store, UTC
    assert processed.utcoffset() == timedelta(0)
    assert abs((datetime.now(timezone.utc) - processed).total_seconds()) < 60


def test_a_record_from_the_processing_pipeline_round_trips(store_path):
    """The record process.py builds from a real Touchstone file is stored as it is."""
    record = process_file(SAMPLE, Settings(band_hz=(902e6, 928e6), lot="lark"))
    with ResultsStore(store_path) as store:
        index = store.append(record)
        back = store.get_unit(index)
        frame = store.units_frame()
    assert back.elements == record.elements and back.config == record.config
    assert back.headroom == json.loads(json.dumps(record.headroom))
    np.testing.assert_array_equal(back.s11_matched, record.s11_matched)
    assert frame.loc[index, "rl_after_worst_db"] == record.rl_after_worst_db
    assert frame.loc[index, "q_estimate"] == record.headroom["q_estimate"]


def test_units_frame_has_one_row_per_unit_with_the_metrics(store_path):
    records = [make_record(i) for i in range(5)]
    with ResultsStore(store_path) as store:
        store.append_many(records)
    frame = units_frame(store_path)
    assert list(frame.index) == [0, 1, 2, 3, 4] and frame.index.name == "record"
    for column in ("dut_id", "lot", "source", "source_sha256", "elements", "n_points",
                   "pass_before", "pass_after") + METRIC_COLUMNS + HEADROOM_COLUMNS:
        assert column in frame.columns, column
    for i, record in enumerate(records):
        row = frame.loc[i]
        assert row["dut_id"] == record.dut_id and row["source"] == record.source
        assert json.loads(row["elements"]) == record.elements
        assert row["rl_before_worst_db"] == record.rl_before_worst_db
        assert row["pass_before"] == (record.rl_before_worst_db >= 10.0)
        assert row["pass_after"] == (record.rl_after_worst_db >= 10.0)
        assert row["q_estimate"] == 5.0 + i and np.isnan(row["headroom_db"])
        assert row["n_points"] == 41
    assert str(frame["processed_at"].dt.tz) == "UTC"
    assert (frame["acquired_at"] == pd.Timestamp("2026-05-09T07:35:25Z")).all()


def test_get_units_returns_full_records_in_the_order_asked(store_path):
    records = [make_record(i, points=11 + i) for i in range(300)]
    with ResultsStore(store_path) as store:
        store.append_many(records)
    asked = [299, 3, 150, 3, 0, 298, 70]
    with ResultsStore(store_path, mode="r") as store:
        units = store.get_units(asked)
        assert store.get_units([]) == []
        with pytest.raises(StoreError, match="no record #300"):
            store.get_units([1, 300])
    assert [u.index for u in units] == asked
    for unit, i in zip(units, asked):
        assert unit.dut_id == records[i].dut_id and unit.elements == records[i].elements
        np.testing.assert_array_equal(unit.s11_dut, records[i].s11_dut)
        np.testing.assert_array_equal(unit.freq_hz, records[i].freq_hz)


def test_units_frame_filters_by_lot(store_path):
    with ResultsStore(store_path) as store:
        store.append_many([make_record(i, lot="lot-A") for i in range(3)]
                          + [make_record(i, lot="lot-B") for i in range(10, 12)])
        assert store.lots() == ["lot-A", "lot-B"]
    assert list(units_frame(store_path, lot="lot-B")["dut_id"]) == ["A0010", "A0011"]
    assert len(units_frame(store_path, lot="nope")) == 0


def test_an_empty_store_gives_empty_frames(store_path):
    with ResultsStore(store_path) as store:
        assert len(store) == 0 and store.lots() == []
        assert len(store.failures_frame()) == 0
    frame = units_frame(store_path)
    assert len(frame) == 0 and "rl_after_worst_db" in frame.columns


# --------------------------------------------------------------------------- idempotence

def test_the_same_file_with_the_same_settings_is_stored_once(store_path):
    record = make_record(1)
    with ResultsStore(store_path) as store:
        first = store.append(record)
        assert store.append(make_record(1)) == first
        assert store.append_many([make_record(1), make_record(2), make_record(2)]) == [first, 1, 1]
        assert store.contains(record.source_sha256, record.settings_hash)
        assert not store.contains(record.source_sha256, "other-settings")
    with ResultsStore(store_path) as store:                 # the keys survive a reopen
        assert store.append(make_record(1)) == first
        assert len(store) == 2
    with ResultsStore(store_path, mode="r") as store:
        assert store.contains(record.source_sha256, record.settings_hash)


def test_a_changed_file_is_a_new_record_that_replaces_the_old_one(store_path):
    with ResultsStore(store_path) as store:
        old = store.append(make_record(1))
        store.append(make_record(2))
        new = store.append(make_record(1, sha="f" * 64))
        assert store.latest_index_for("A0001") == new
        assert store.get_unit(new).replaces == old
        assert store.find(dut_id="A0001") == [new]
        assert store.find(dut_id="A0001", latest_only=False) == [old, new]
    latest = units_frame(store_path)
    assert list(latest["dut_id"]) == ["A0002", "A0001"] and list(latest.index) == [1, 2]
    everything = units_frame(store_path, latest_only=False)
    assert len(everything) == 3 and everything.loc[new, "replaces"] == old
    with ResultsStore(store_path, mode="r") as store:
        assert store.latest_index_for("A0001") == new and store.latest_index_for("zz") is None


def test_the_same_file_under_new_settings_replaces_the_old_result(store_path):
    with ResultsStore(store_path) as store:
        old = store.append(make_record(1))
        changed = make_record(1)
        changed.settings_hash = settings_hash({"band_hz": [860e6, 960e6]})
        new = store.append(changed)
        assert new != old and store.get_unit(new).replaces == old


def test_a_missing_settings_hash_is_derived_from_the_settings(store_path):
    a, b = make_record(1), make_record(1)
    a.settings_hash = b.settings_hash = ""
    b.config = {"band_hz": [860e6, 960e6]}
    with ResultsStore(store_path) as store:
        assert store.append(a) != store.append(b)
        assert store.append(make_record(1, sha=a.source_sha256)) == 2     # a third setting


def test_settings_hash_is_sha256_of_sorted_compact_json():
    settings = {"z0_ohm": 50.0, "band_hz": [902e6, 928e6], "parts": {"q": 35, "name": "x"}}
    reference = hashlib.sha256(
        b'{"band_hz":[902000000.0,928000000.0],"parts":{"name":"x","q":35},"z0_ohm":50.0}').hexdigest()
    assert settings_hash(settings) == reference
    assert settings_hash(dict(reversed(list(settings.items())))) == reference
    assert settings_hash({**settings, "z0_ohm": 75.0}) != reference
    assert settings_hash({"q": np.float64(35.0)}) == settings_hash({"q": 35.0})


# --------------------------------------------------------------------------- failures, lots

def test_failures_are_logged_once_per_file_and_settings(store_path):
    with ResultsStore(store_path) as store:
        store.append_failure("/lots/a/bad.s1p", "ab" * 32, "truncated last row\nline 40", lot="lot-A",
                             settings_hash="s1")
        store.append_failure("/lots/a/bad.s1p", "ab" * 32, "truncated last row\nline 40", lot="lot-A",
                             settings_hash="s1")
        store.append_failure("/lots/a/gone.s1p", "", "cannot read file", lot="lot-A", settings_hash="s1")
        store.append_failure("/lots/a/gone.s1p", "", "cannot read file", lot="lot-A", settings_hash="s1")
        store.append_failure("/lots/b/bad.s1p", "cd" * 32, "NaN in data", lot="lot-B", settings_hash="s1")
        assert store.has_failure("ab" * 32, "s1") and not store.has_failure("ab" * 32, "s2")
    with ResultsStore(store_path) as store:                    # a rerun after reopening
        store.append_failure("/lots/a/bad.s1p", "ab" * 32, "truncated", lot="lot-A", settings_hash="s1")
        store.append_failure("/lots/a/gone.s1p", "", "cannot read file", lot="lot-A", settings_hash="s1")
        frame = store.failures_frame()
        assert list(frame["source"]) == ["/lots/a/bad.s1p", "/lots/a/gone.s1p", "/lots/b/bad.s1p"]
        assert frame.iloc[0]["reason"] == "truncated last row line 40"     # one line
        assert list(store.failures_frame(lot="lot-B")["reason"]) == ["NaN in data"]
        assert store.lots() == ["lot-A", "lot-B"]
    with ResultsStore(store_path, mode="r") as store:
        assert store.has_failure("cd" * 32, "s1")


def test_a_later_lot_summary_supersedes_the_earlier_one(store_path):
    first = {"shared": {"elements": [{"position": "shunt", "kind": "capacitor", "value": 2.7e-12}]},
             "yield_shared": 0.91, "tolerance": {"trials": 2000}}
    second = {**first, "yield_shared": np.float64(0.94)}
    with ResultsStore(store_path) as store:
        assert store.get_lot("lot-A") is None
        store.put_lot("lot-A", first)
        store.put_lot("lot-B", {"yield_shared": 0.5})
        store.put_lot("lot-A", second)
        store.put_lot("lot-A", second)                  # identical: not stored again
        assert store.get_lot("lot-A")["yield_shared"] == 0.94
    with h5py.File(store_path, "r") as f:
        assert f["lots/index"].shape == (3,)
    with ResultsStore(store_path, mode="r") as store:
        assert store.get_lot("lot-A") == json.loads(json.dumps({**first, "yield_shared": 0.94}))
        assert store.lots() == ["lot-A", "lot-B"]


# --------------------------------------------------------------------------- bad input

def test_a_reader_refuses_what_is_not_a_store(tmp_path):
    with pytest.raises(StoreError, match="no such results store"):
        ResultsStore(tmp_path / "none.h5", mode="r")
    text = tmp_path / "notes.h5"
    text.write_text("not hdf5")
    with pytest.raises(StoreError, match="not an HDF5 file"):
        ResultsStore(text, mode="r")
    with pytest.raises(StoreError, match="not an HDF5 file"):
        ResultsStore(text, mode="a")
    assert text.read_text() == "not hdf5"
    other = tmp_path / "other.h5"
    with h5py.File(other, "w", libver=("v110", "v110")) as f:
        f["data"] = np.arange(3)
    for mode in ("r", "a"):
        with pytest.raises(StoreError, match="not a matchbay results store"):
            ResultsStore(other, mode=mode)
    with h5py.File(other, "r") as f:
        assert list(f) == ["data"]


def test_only_one_writer_at_a_time(store_path):
    with ResultsStore(store_path):
        with pytest.raises(StoreError, match="another process is writing"):
            ResultsStore(store_path)
    with ResultsStore(store_path) as store:            # released on close
        store.append(make_record(1))


def test_a_reader_cannot_write(store_path):
    ResultsStore(store_path).close()
    with ResultsStore(store_path, mode="r") as store:
        with pytest.raises(StoreError, match="read-only"):
            store.append(make_record(1))
        with pytest.raises(StoreError, match="read-only"):
            store.put_lot("x", {})


@pytest.mark.parametrize("change, message", [
    (lambda r: setattr(r, "dut_id", "D" * 200), "dut_id is 200 bytes long"),
    (lambda r: setattr(r, "dut_id", ""), "no dut_id"),
    (lambda r: setattr(r, "s11_dut", r.s11_dut[:-1]), "s11_dut has shape"),
    (lambda r: setattr(r, "freq_hz", np.array([])), "freq_hz must be a non-empty"),
    (lambda r: setattr(r, "config", {"when": object()}), "config cannot be stored as JSON"),
    (lambda r: r.headroom.update(q_estimate="high"), "headroom q_estimate must be a number"),
    (lambda r: setattr(r, "acquired_at", "yesterday"), "acquired_at 'yesterday' is not an ISO 8601"),
])
def test_a_bad_record_is_refused_and_nothing_is_written(store_path, change, message):
    bad = make_record(9)
    change(bad)
    with ResultsStore(store_path) as store:
        store.append(make_record(1))
        with pytest.raises(StoreError, match=message):
            store.append_many([make_record(2), bad])
        assert len(store) == 1 and store.append(make_record(2)) == 1
    with h5py.File(store_path, "r") as f:
        assert f["units/index"].shape == (2,)


def test_a_missing_record_number_is_a_store_error(store_path):
    with ResultsStore(store_path) as store:
        store.append(make_record(1))
        with pytest.raises(StoreError, match="no record #5"):
            store.get_unit(5)


# --------------------------------------------------------------------------- layout

def test_the_layout_reads_with_plain_h5py(store_path):
    """What store-layout.md documents: index rows point into flat payload datasets."""
    records = [make_record(i, points=21 + i) for i in range(3)]
    with ResultsStore(store_path) as store:
        store.append_many(records)
    with h5py.File(store_path, "r") as f:
        assert f.attrs["format"] == "matchbay-results" and f.attrs["format_version"] == 1
        assert set(f) == {"units", "failures", "lots"}
        assert set(f["units"]) == {"index", "traces", "strings", "documents"}
        rows = f["units/index"][...]
        strings = f["units/strings"][...].tobytes()
        documents = f["units/documents"][...].tobytes()
        for row, record in zip(rows, records):
            assert row["dut_id"].decode() == record.dut_id and row["n_points"] == len(record.freq_hz)
            traces = f["units/traces"][row["traces_offset"]:row["traces_offset"] + row["n_points"]]
            np.testing.assert_array_equal(traces["freq_hz"], record.freq_hz)
            np.testing.assert_array_equal(traces["s11_matched"], record.s11_matched)
            start = row["strings_offset"]
            source = strings[start:start + row["source_nbytes"]].decode()
            start += row["source_nbytes"]
            elements = json.loads(strings[start:start + row["elements_nbytes"]])
            assert source == record.source and elements == record.elements
            start = row["documents_offset"]
            assert json.loads(documents[start:start + row["config_nbytes"]]) == record.config
            assert row["rl_after_worst_db"] == record.rl_after_worst_db
            assert row["crc32"] == zlib.crc32(row.tobytes()[:rows.dtype.fields["crc32"][1]])


# --------------------------------------------------------------------------- crash recovery

def _commit_then_die(path: Path, n: int) -> None:
    """A writer process that commits ``n`` units and is then killed with SIGKILL."""
    code = textwrap.dedent(f"""
        import os, signal, sys
        sys.path.insert(0, {str(REPO / "tests")!r})
        from test_store import make_record
        from pipeline.store import ResultsStore
        store = ResultsStore({str(path)!r})
        store.append_many([make_record(i) for i in range({n})])
        os.kill(os.getpid(), signal.SIGKILL)
    """)
    done = subprocess.run([sys.executable, "-c", code], cwd=REPO, capture_output=True, text=True,
                          env=dict(os.environ, PYTHONPATH=str(REPO)), timeout=60)
    assert done.returncode == -signal.SIGKILL, done.stderr


def test_after_a_killed_writer_the_next_writer_opens_without_external_tools(store_path):
    _commit_then_die(store_path, 3)
    # HDF5 itself refuses a plain open: the crashed SWMR writer's mark is still set ...
    with pytest.raises(OSError, match="already open for write"):
        h5py.File(store_path, "r")
    # ... a SWMR reader gets in anyway, and sees every committed unit ...
    assert list(units_frame(store_path)["dut_id"]) == ["A0000", "A0001", "A0002"]
    # ... and the next writer clears the mark itself and carries on.
    with ResultsStore(store_path) as store:
        assert store.append(make_record(1)) == 1
        assert store.append(make_record(3)) == 3
    with h5py.File(store_path, "r") as f:                   # a clean close: plain opens work
        assert f["units/index"].shape == (4,)
    back = ResultsStore(store_path, mode="r")
    np.testing.assert_array_equal(back.get_unit(3).s11_dut, make_record(3).s11_dut)
    back.close()


def _tear_the_tail(path: Path) -> None:
    """Leave what a writer killed mid-commit can leave: orphan payload, a torn index row,
    and beyond it a row that looks valid (a group written out of order)."""
    with h5py.File(path, "r+") as f:
        index, traces = f["units/index"], f["units/traces"]
        rows = index[...]
        n, end = len(rows), traces.shape[0]
        traces.resize((end + 100,))
        traces[end:] = traces[end - 100:end]
        torn, valid_looking = rows[-1].copy(), rows[-1].copy()
        torn["traces_offset"] = end
        torn["dut_id"] = b"TORN"                          # CRC no longer matches
        valid_looking["traces_offset"] = end + 50
        valid_looking["dut_id"] = b"GHOST"
        # the documented check: CRC-32 (zlib) of the row's bytes before the crc32 field
        valid_looking["crc32"] = zlib.crc32(valid_looking.tobytes()[:rows.dtype.fields["crc32"][1]])
        index.resize((n + 2,))
        index[n:] = np.array([torn, valid_looking], dtype=rows.dtype)


def test_torn_rows_at_the_end_are_ignored_then_cut_off(store_path):
    with ResultsStore(store_path) as store:
        store.append_many([make_record(i) for i in range(4)])
    _tear_the_tail(store_path)
    assert list(units_frame(store_path)["dut_id"]) == ["A0000", "A0001", "A0002", "A0003"]
    with ResultsStore(store_path) as store:
        with h5py.File(store_path, "r", swmr=True) as f:
            assert f["units/index"].shape == (4,)
            assert f["units/traces"].shape == (4 * 41,)
        assert store.append(make_record(4)) == 4
        np.testing.assert_array_equal(store.get_unit(4).freq_hz, make_record(4).freq_hz)
    assert list(units_frame(store_path)["dut_id"]) == [f"A{i:04d}" for i in range(5)]


# --------------------------------------------------------------------------- concurrent reading

WRITER = textwrap.dedent("""
    import sys, time
    sys.path.insert(0, sys.argv[2])
    from test_store import make_record
    from pipeline.store import ResultsStore
    with ResultsStore(sys.argv[1]) as store:
        print("open", flush=True)
        for i in range(0, 1500, 5):
            store.append_many([make_record(j, points=401) for j in range(i, i + 5)])
            print("ack", i + 5, flush=True)
            time.sleep(0.002)
    print("done", flush=True)
""")


def test_a_reader_sees_the_store_grow_while_a_writer_appends(store_path):
    child = subprocess.Popen([sys.executable, "-c", WRITER, str(store_path), str(REPO / "tests")],
                             stdout=subprocess.PIPE, text=True, cwd=REPO,
                             env=dict(os.environ, PYTHONPATH=str(REPO)))
    acked = [0]
    opened, finished = threading.Event(), threading.Event()

    def follow():
        for line in child.stdout:
            if line.startswith("open"):
                opened.set()
            elif line.startswith("ack"):
                acked[0] = int(line.split()[1])
        finished.set()

    threading.Thread(target=follow, daemon=True).start()
    assert opened.wait(timeout=60)
    counts = []
    while not finished.is_set():
        committed_before = acked[0]
        frame = units_frame(store_path)
        assert len(frame) >= committed_before             # every acknowledged unit is visible
        assert not frame["dut_id"].duplicated().any()
        counts.append(len(frame))
        time.sleep(0.01)
    assert child.wait(timeout=60) == 0
    assert counts == sorted(counts) and len(set(counts)) >= 3
    assert len(units_frame(store_path)) == 1500


# --------------------------------------------------------------------------- the CLI

@pytest.fixture
def filled_store(store_path, monkeypatch):
    monkeypatch.setenv("COLUMNS", "200")                    # rich: no wrapping in captured output
    with ResultsStore(store_path) as store:
        records = [make_record(i) for i in range(4)]
        records[2].rl_after_worst_db = 7.5                  # misses the 10 dB spec after matching
        store.append_many(records)
        store.append_many([make_record(i, lot="lot-B") for i in range(20, 22)])
        store.append_failure("/lots/lot-A/broken.s1p", "ee" * 32, "truncated last row (line 12)",
                             lot="lot-A", settings_hash="s")
        store.put_lot("lot-A", {"shared": {"elements": [
            {"position": "shunt", "kind": "capacitor", "value": 2.7e-12},
            {"position": "series", "kind": "inductor", "value": 1.5e-8}],
            "n_pass": 3, "n_units": 4, "yield_fraction": 0.75, "failing_unit_ids": ["A0002"]},
            "tolerance": {"yield_fraction": 0.7, "confidence": 0.95, "ci_low": 0.66, "ci_high": 0.74,
                          "n_trials": 500, "distribution": "uniform"}})
    return store_path


def test_results_list_shows_units_and_filters_failing_ones(filled_store, capsys):
    assert main(["results", "list", str(filled_store)]) == 0
    out = capsys.readouterr().out
    assert all(f"A{i:04d}" in out for i in (0, 1, 2, 3, 20, 21))
    assert "shunt C 3.3 pF, series L 12 nH" in out
    assert main(["results", "list", str(filled_store), "--lot", "lot-A", "--failing"]) == 0
    out = capsys.readouterr().out
    assert "A0002" in out and "A0001" not in out and "A0020" not in out


def test_results_show_by_dut_id_and_by_record_number(filled_store, capsys):
    assert main(["results", "show", str(filled_store), "A0001"]) == 0
    out = capsys.readouterr().out
    for text in ("/lots/lot-A/A0001.s1p", "shunt-C, series-L", "series L 12 nH", "q=35",
                 "port_extension", "generic-0402", "E24", "902 MHz"):
        assert text in out, text
    assert main(["results", "show", str(filled_store), "#4"]) == 0
    assert "A0020" in capsys.readouterr().out


def test_results_export_writes_the_contract_columns(filled_store, tmp_path):
    out = tmp_path / "units.csv"
    assert main(["results", "export", str(filled_store), "--csv", str(out), "--lot", "lot-A"]) == 0
    with out.open(newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert set(INTERFACE_CSV_COLUMNS) <= set(rows[0])
    assert [r["dut_id"] for r in rows] == ["A0000", "A0001", "A0002", "A0003"]
    first = make_record(0)
    assert float(rows[0]["return_loss_before_db"]) == pytest.approx(first.rl_before_worst_db, rel=1e-12)
    assert float(rows[0]["band_hi_hz"]) == 928e6
    assert json.loads(rows[0]["elements"]) == first.elements
    assert rows[0]["source_sha256"] == first.source_sha256
    assert not list(tmp_path.glob(".units.csv.*"))          # no temporary left behind


def test_results_summary_reports_pass_rates_failures_and_the_shared_network(filled_store, capsys):
    assert main(["results", "summary", str(filled_store), "--lot", "lot-A"]) == 0
    out = capsys.readouterr().out
    frame = units_frame(filled_store, lot="lot-A")
    passed_before = int(frame["pass_before"].sum())
    assert f"{passed_before}/4" in out and "3/4 (75 %)" in out
    assert "broken.s1p" in out and "truncated last row (line 12)" in out
    assert "shunt C 2.7 pF, series L 15 nH" in out and "3/4 (75 %)" in out
    assert "70.0 % (95 % CI 66.0–74.0 %" in out and "A0002" in out
    assert main(["results", "summary", str(filled_store)]) == 0
    assert "Lot lot-B" in capsys.readouterr().out


@pytest.mark.parametrize("args", [
    ["results", "list", "{missing}"],
    ["results", "show", "{missing}", "A0001"],
    ["results", "export", "{missing}", "--csv", "{tmp}/x.csv"],
    ["results", "summary", "{text}"],
    ["results", "show", "{store}", "NO-SUCH-DUT"],
    ["results", "show", "{store}", "#x"],
    ["results", "export", "{store}", "--csv", "{tmp}/no/such/folder/x.csv"],
])
def test_results_errors_are_one_line_and_exit_2(filled_store, tmp_path, capsys, args):
    text = tmp_path / "text.h5"
    text.write_text("hello")
    names = {"missing": tmp_path / "missing.h5", "text": text, "store": filled_store, "tmp": tmp_path}
    assert main([a.format(**names) for a in args]) == 2
    err = capsys.readouterr().err
    assert err.startswith("matchbay: ") and err.count("\n") == 1
