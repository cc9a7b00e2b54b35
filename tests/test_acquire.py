"""Touchstone ingest: spec examples, the scikit-rf 2.2.0 corrections, provenance, bad files.

Reference values come from ../shared/reference/references.json (ids in the test names or
beside the values); the Touchstone rules are those of the IBIS Touchstone specification
v1.1 / 2.0 as summarised there.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import os
import subprocess
import sys
import warnings
from pathlib import Path

import numpy as np
import pytest
import skrf

from pipeline.acquire import IngestWarning, read_sweep, sha256_file
from pipeline.errors import InputFileError

REPO = Path(__file__).resolve().parents[1]
SAMPLES = REPO / "sample_measurements"

GOOD_1PORT = "# MHz S RI R 50\n900 0.1 0.2\n910 0.1 0.1\n920 0.2 0.0\n930 0.0 0.3\n"


def write(tmp_path: Path, name: str, text: str) -> Path:
    path = tmp_path / name
    path.write_text(text, encoding="ascii")
    return path


# --- spec examples and reference values ----------------------------------------------

def test_spec_1port_ma_example(tmp_path):
    """TS-SPEC-1PORT-MA: 2 MHz, 0.894 at -12.136 deg -> 0.874020 - j0.187948, RL 0.97325 dB."""
    path = write(tmp_path, "ex.s1p", "!1-port\n# MHz S MA R 50\n!freq magS11 angS11\n2.000 0.894 -12.136\n")
    sweep = read_sweep(path)
    assert sweep.freq_hz.tolist() == [2e6]
    assert sweep.s11[0] == pytest.approx(0.874020294860635 - 0.18794819544685323j, abs=1e-12)
    assert -20 * np.log10(abs(sweep.s11[0])) == pytest.approx(0.9732496240816463, abs=1e-9)


def test_default_option_line(tmp_path):
    """TS-DEFAULT-OPTION-LINE: '#' alone is '# GHz S MA R 50'."""
    sweep = read_sweep(write(tmp_path, "d.s1p", "#\n2 0.5 90\n"))
    assert sweep.freq_hz[0] == 2e9
    assert sweep.s11[0] == pytest.approx(0.5j, abs=1e-12)


def test_db_format_and_case_insensitive(tmp_path):
    """TS-DB-FORMAT: '# mhz s db r 50' / '2 -20 0' -> 2 MHz, S11 = 0.1."""
    sweep = read_sweep(write(tmp_path, "db.s1p", "# mhz s db r 50\n2 -20 0\n"))
    assert sweep.freq_hz[0] == 2e6
    assert sweep.s11[0] == pytest.approx(0.1, abs=1e-12)


def test_v1_y_parameters_are_normalised_TS_V1_Y_NORMALISED(tmp_path):
    """Spec: v1 Y data are y = Y*R. '# MHz Y RI R 50' / '100 1 0' is Y = 0.02 S: a matched
    load, S11 = 0. (scikit-rf 2.2.0 alone reads Y = 50 S, S11 = -0.9992.)"""
    sweep = read_sweep(write(tmp_path, "y.s1p", "# MHz Y RI R 50\n100 1 0\n"))
    assert abs(sweep.s11[0]) < 1e-9
    assert sweep.z_ohm[0] == pytest.approx(50.0, rel=1e-9)


def test_v1_y_with_other_reference_and_two_ports(tmp_path):
    """y normalised to R = 75: y11 = 1 -> 75 ohm; y22 = 2 -> 37.5 ohm (independent of skrf)."""
    path = write(tmp_path, "y2.s2p", "# MHz Y RI R 75\n100 1 0 0 0 0 0 2 0\n")
    assert read_sweep(path, port=1, z0=75).s11[0] == pytest.approx(0, abs=1e-9)
    assert read_sweep(path, port=1, z0=50).z_ohm[0] == pytest.approx(75.0, rel=1e-9)
    port2 = read_sweep(path, port=2, z0=50)
    assert port2.z_ohm[0] == pytest.approx(37.5, rel=1e-9)
    assert port2.s11[0] == pytest.approx((37.5 - 50) / (37.5 + 50), abs=1e-9)


def test_v1_and_v2_z_files_agree_TS_V1_Z_NORMALISED(tmp_path):
    """Spec examples: v1 '# MHz Z MA R 75' 0.99 at -4 deg and v2 74.25 ohm at -4 deg are the
    same impedance, 74.0691 - j5.1794 ohm at 100 MHz."""
    v1 = write(tmp_path, "z.s1p", "# MHz Z MA R 75\n100 0.99 -4\n200 0.80 -22\n300 0.707 -45\n"
                                  "400 0.40 -62\n500 0.01 -89\n")
    v2 = write(tmp_path, "z.ts", "[Version] 2.0\n# MHz Z MA\n[Number of Ports] 1\n"
                                 "[Number of Frequencies] 5\n[Reference] 20.0\n[Network Data]\n"
                                 "100 74.25 -4\n200 60 -22\n300 53.025 -45\n400 30 -62\n500 0.75 -89\n")
    z1, z2 = read_sweep(v1).z_ohm, read_sweep(v2).z_ohm
    assert z1[0] == pytest.approx(74.06913073179194 - 5.179418175501303j, abs=1e-9)
    np.testing.assert_allclose(z1, z2, rtol=1e-9)


def test_renormalisation_transforms_impedance(tmp_path):
    """A 75-ohm file read at 50 ohm keeps Z: Gamma50 = (Z - 50)/(Z + 50) (Pozar Sec. 2.3)."""
    path = write(tmp_path, "r75.s1p", "# MHz S RI R 75\n900 0.2 0.1\n910 -0.3 0.4\n")
    s75 = np.array([0.2 + 0.1j, -0.3 + 0.4j])
    z = 75 * (1 + s75) / (1 - s75)
    sweep = read_sweep(path, z0=50)
    np.testing.assert_allclose(sweep.s11, (z - 50) / (z + 50), atol=1e-12)
    assert sweep.z0_ohm == 50


def test_spec_2port_order_and_port_choice_TS_SPEC_2PORT_ORDER_V1(tmp_path):
    text = ("# GHz S RI R 50.0\n"
            "1.0000 0.3926 -0.1211 -0.0003 -0.0021 -0.0003 -0.0021 0.3926 -0.1211\n"
            "2.0000 0.3517 -0.3054 -0.0096 -0.0298 -0.0096 -0.0298 0.3517 -0.3054\n"
            "10.000 0.3419 0.3336 -0.0134 0.0379 -0.0134 0.0379 0.3419 0.3336\n")
    path = write(tmp_path, "spec.s2p", text)
    assert read_sweep(path, port=1).s11[0] == pytest.approx(0.3926 - 0.1211j, abs=1e-12)
    assert read_sweep(path, port=2).s11[2] == pytest.approx(0.3419 + 0.3336j, abs=1e-12)


def test_per_port_reference_renormalised_like_scikit_rf(tmp_path):
    """TS-V1.1-PER-PORT-R ('R 50 200'): port 2 referred to 50 ohm with the other port at
    50 ohm, checked against scikit-rf's renormalize of the same file (S data: skrf agrees
    with the spec there)."""
    path = write(tmp_path, "pp.s2p", "# GHz S RI R 50 200\n1 0.1 0.2 0.3 0.1 0.3 0.1 0.5 -0.2\n"
                                     "2 0.2 0.1 0.2 0.2 0.2 0.2 0.4 0.1\n")
    reference = skrf.Network(str(path))
    reference.renormalize(50)
    np.testing.assert_allclose(read_sweep(path, port=2).s11, reference.s[:, 1, 1], atol=1e-12)


@pytest.mark.parametrize("nports, version", [(3, "1.0"), (4, "1.0"), (4, "2.0"), (6, "1.0")])
def test_any_port_count(tmp_path, nports, version):
    """N-port files (rows wrapped over several lines, TS-ORDER-2PORT-VS-3PORT) give S_pp."""
    rng = np.random.default_rng(nports)
    s = 0.15 * (rng.normal(size=(5, nports, nports)) + 1j * rng.normal(size=(5, nports, nports)))
    freq = skrf.Frequency.from_f(np.linspace(1e9, 2e9, 5), unit="Hz")
    name = f"n.s{nports}p" if version == "1.0" else "n.ts"
    skrf.Network(frequency=freq, s=s, z0=50).write_touchstone(str(tmp_path / name), version=version)
    for port in range(1, nports + 1):
        np.testing.assert_allclose(read_sweep(tmp_path / name, port=port).s11, s[:, port - 1, port - 1],
                                   atol=1e-12)
    lines = (tmp_path / name).read_text().splitlines()
    damaged = [line.replace(line.split()[1], "x1", 1) if i == len(lines) - 3 else line
               for i, line in enumerate(lines)]
    (tmp_path / name).write_text("\n".join(damaged) + "\n")
    with pytest.raises(InputFileError, match=f":{len(lines) - 2}: non-numeric value 'x1'"):
        read_sweep(tmp_path / name)


def test_v1_noise_block_is_not_network_data_TS_NOISE_V1(tmp_path):
    text = ("!2-port network, S-parameter and noise data\n#\n! NETWORK PARAMETERS\n"
            "2 .95 -26 3.57 157 .04 76 .66 -14\n22 .60 -144 1.30 40 .14 40 .56 -85\n"
            "! NOISE PARAMETERS\n4 .7 .64 69 .38\n18 2.7 .46 -33 .40\n")
    sweep = read_sweep(write(tmp_path, "noise.s2p", text), port=2)
    assert sweep.freq_hz.tolist() == [2e9, 22e9]
    assert sweep.s11[0] == pytest.approx(0.66 * np.exp(-1j * np.deg2rad(14)), abs=1e-12)


def test_triangular_v2_two_port_is_deterministic(tmp_path):
    """scikit-rf 2.2.0 fills S12/S21 of an Upper-format v2 2-port (legacy order) from
    uninitialised memory (library notes 1.1); renormalising mixes them into S11, so read
    it many times and compare with the full symmetric matrix through scikit-rf."""
    text = ("[Version] 2.0\n# GHz S RI R 50\n[Number of Ports] 2\n[Number of Frequencies] 2\n"
            "[Matrix Format] Upper\n[Network Data]\n1 0.1 0.0 0.3 0.1 0.2 0.0\n"
            "2 0.2 0.0 0.3 0.2 0.1 0.0\n[End]\n")
    path = write(tmp_path, "upper.ts", text)
    s = np.array([[[0.1, 0.3 + 0.1j], [0.3 + 0.1j, 0.2]], [[0.2, 0.3 + 0.2j], [0.3 + 0.2j, 0.1]]])
    full = skrf.Network(frequency=skrf.Frequency.from_f([1e9, 2e9], unit="Hz"), s=s, z0=50)
    full.renormalize(75)
    for _ in range(20):
        poison = np.full((2, 4), 5.0 + 5.0j)     # leave non-zero garbage where np.empty looks
        del poison
        np.testing.assert_allclose(read_sweep(path, port=1, z0=75).s11, full.s[:, 0, 0], atol=1e-12)


# --- provenance --------------------------------------------------------------------------

def test_provenance(tmp_path):
    path = write(tmp_path, "LKS-0042.s1p", GOOD_1PORT)
    stamp = dt.datetime(2024, 3, 1, 12, 0, 5, tzinfo=dt.timezone.utc).timestamp()
    os.utime(path, (stamp, stamp))
    sweep = read_sweep(path, lot="915-A")
    prov = sweep.provenance
    assert prov.dut_id == "LKS-0042"
    assert prov.lot == "915-A"
    assert prov.source == str(path)
    assert prov.source_sha256 == hashlib.sha256(path.read_bytes()).hexdigest() == sha256_file(path)
    assert prov.acquired_at == "2024-03-01T12:00:05+00:00"
    assert prov.port == 1
    assert read_sweep(path, dut_id="unit 7").provenance.dut_id == "unit 7"


def test_source_is_kept_as_given(tmp_path, monkeypatch):
    write(tmp_path, "rel.s1p", GOOD_1PORT)
    monkeypatch.chdir(tmp_path)
    assert read_sweep("rel.s1p").provenance.source == "rel.s1p"


def test_sha256_file_raises_oserror_for_missing(tmp_path):
    with pytest.raises(OSError):
        sha256_file(tmp_path / "nope.s1p")


# --- bad files ---------------------------------------------------------------------------
# name -> (file name, text or None for "do not create", expected line or None, words in message)

def _lines(*rows: str) -> str:
    return "\n".join(rows) + "\n"


BAD_FILES = {
    "missing": ("gone.s1p", None, None, "not found"),
    "empty": ("empty.s1p", "", None, "empty"),
    "blank": ("blank.s1p", "  \n\n", None, "empty"),
    "header_only": ("hdr.s1p", "! comment\n# MHz S RI R 50\n", None, "no data"),
    "truncated_last_row": ("trunc.s1p", GOOD_1PORT + "940 0.1\n", 6, "2 values"),
    "non_numeric": ("abc.s1p", GOOD_1PORT.replace("910 0.1 0.1", "910 0.1 abc"), 3, "'abc'"),
    "comma_separated": ("comma.s1p", GOOD_1PORT.replace("910 0.1 0.1", "910,0.1,0.1"), 3, "non-numeric"),
    "unsorted": ("unsorted.s1p", GOOD_1PORT.replace("910 0.1", "925 0.1"), 4, "below"),
    "duplicate_frequency": ("dup.s1p", GOOD_1PORT.replace("910 0.1", "900 0.1"), 3, "repeats"),
    "nan": ("nan.s1p", GOOD_1PORT.replace("920 0.2", "920 nan"), 4, "'nan'"),
    "inf": ("inf.s1p", GOOD_1PORT.replace("0.0 0.3", "0.0 inf"), 5, "'inf'"),
    "negative_frequency": ("neg.s1p", _lines("# MHz S RI R 50", "-900 0.1 0.2", "910 0.1 0.1"), 2, "negative"),
    "wrong_number_of_frequencies": (
        "nf.ts", _lines("[Version] 2.0", "# MHz S RI R 50", "[Number of Ports] 1",
                        "[Number of Frequencies] 5", "[Network Data]", "900 0.1 0.2", "910 0.1 0.1",
                        "[End]"), 4, "says 5"),
    "v2_without_version": ("nover.ts", _lines("# MHz S RI R 50", "[Number of Ports] 1",
                                              "[Network Data]", "900 0.1 0.2"), 1, "[Version]"),
    "v2_without_ports": ("noports.ts", _lines("[Version] 2.0", "# MHz S RI R 50",
                                              "[Number of Frequencies] 1", "[Network Data]",
                                              "900 0.1 0.2"), 4, "Number of Ports"),
    "falling_frequency_2port_v1": (
        "fall.s2p", _lines("# GHz S RI R 50", "1 0.1 0 0.5 0 0.5 0 0.1 0", "3 0.1 0 0.5 0 0.5 0 0.1 0",
                           "2 0.1 0 0.5 0 0.5 0 0.1 0"), 4, "below"),
    "two_port_data_in_s1p": ("wide.s1p", _lines("# GHz S RI R 50", "1 0.1 0 0.5 0 0.5 0 0.1 0"), 2,
                             "9 values"),
    "bad_option_line": ("opt.s1p", _lines("# MHz S XY R 50", "900 0.1 0.2"), 1, "unknown format"),
    "zero_reference": ("r0.s1p", _lines("# MHz S RI R 0", "900 0.1 0.2"), 1, "must be positive"),
    "hybrid_parameters": ("h.s2p", _lines("# GHz H RI R 50", "1 0.1 0 0.5 0 0.5 0 0.1 0"), 1, "H-parameter"),
    "unsupported_extension": ("data.txt", GOOD_1PORT, None, "extension"),
    "not_passive": ("hot.s1p", _lines("# MHz S RI R 50", "900 0.1 0.2", "910 1.3 0.1", "920 0.1 0.1"), 3,
                    "passive"),
}


def make_bad_file(tmp_path: Path, case: str) -> tuple[Path, int | None, str]:
    """Write the named bad file under ``tmp_path``: (path, expected line, expected words)."""
    name, text, line, words = BAD_FILES[case]
    path = tmp_path / name
    if text is not None:
        path.write_text(text, encoding="ascii")
    return path, line, words


@pytest.mark.parametrize("case", sorted(BAD_FILES))
def test_bad_file_gives_one_located_line(tmp_path, case):
    path, line, words = make_bad_file(tmp_path, case)
    with pytest.raises(InputFileError) as caught:
        read_sweep(path)
    message = str(caught.value)
    assert "\n" not in message
    expected_place = f"{path}:{line}: " if line is not None else f"{path}: "
    assert message.startswith(expected_place), message
    assert words in message


def test_folder_is_refused(tmp_path):
    folder = tmp_path / "unit.s1p"
    folder.mkdir()
    with pytest.raises(InputFileError, match="folder"):
        read_sweep(folder)


def test_size_limit(tmp_path):
    path = write(tmp_path, "big.s1p", GOOD_1PORT)
    assert read_sweep(path, max_bytes=len(GOOD_1PORT)).freq_hz.size == 4
    with pytest.raises(InputFileError, match="over the 20 bytes limit"):
        read_sweep(path, max_bytes=20)


@pytest.mark.parametrize("port", [0, 2, -1])
def test_port_out_of_range(tmp_path, port):
    path = write(tmp_path, "one.s1p", GOOD_1PORT)
    with pytest.raises(InputFileError, match=r"out of range: the file has 1 port \(1\.\.1\)"):
        read_sweep(path, port=port)


def test_slightly_active_reading_is_a_warning(tmp_path):
    """1.05 < |S11| <= 1.2: accepted (VNA noise, calibration drift) with an IngestWarning."""
    path = write(tmp_path, "warm.s1p", _lines("# MHz S RI R 50", "900 1.08 0.0", "910 0.1 0.1"))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        sweep = read_sweep(path)
    assert sweep.freq_hz.size == 2
    assert [type(w.message) for w in caught] == [IngestWarning]
    assert "1.080" in str(caught[0].message)


def test_noise_level_reading_is_silent(tmp_path):
    path = write(tmp_path, "ok.s1p", _lines("# MHz S RI R 50", "900 1.04 0.0", "910 0.1 0.1"))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        read_sweep(path)


# --- the sample files --------------------------------------------------------------------

@pytest.mark.parametrize("name, port", [("larkspur_915.s1p", 1), ("wren_chip_2g4.s1p", 1),
                                        ("wren_chip_2g4_lead40mm.s1p", 1),
                                        ("wren_gateway_2port.s2p", 1), ("wren_gateway_2port.s2p", 2),
                                        ("heron_whip_868_z.ts", 1)])
def test_sample_files_read(name, port):
    path = SAMPLES / name
    sweep = read_sweep(path, port=port)
    assert np.all(np.abs(sweep.s11) < 1.0)
    assert path.stat().st_size < 100 * 1024


def test_gateway_port_2_is_the_wren_chip_antenna():
    """The 2-port sample's port 2 is the single-port Wren antenna (same model, own noise)."""
    single = read_sweep(SAMPLES / "wren_chip_2g4.s1p")
    port2 = read_sweep(SAMPLES / "wren_gateway_2port.s2p", port=2)
    common = np.isin(single.freq_hz, port2.freq_hz)
    assert np.count_nonzero(common) == 101
    np.testing.assert_allclose(single.s11[common], port2.s11[np.isin(port2.freq_hz, single.freq_hz)],
                               atol=0.02)


def test_sample_lot_has_one_malformed_unit():
    failures = {}
    for path in sorted((SAMPLES / "lot-915").glob("*.s1p")):
        try:
            read_sweep(path)
        except InputFileError as error:
            failures[path.name] = str(error)
    assert len(list((SAMPLES / "lot-915").glob("*.s1p"))) >= 60
    assert list(failures) == ["LKS-0037.s1p"]
    assert ":244: " in failures["LKS-0037.s1p"]


def test_sample_generator_reproduces_the_committed_files(tmp_path):
    subprocess.run([sys.executable, str(SAMPLES / "make_samples.py"), str(tmp_path)], check=True)
    made = sorted(p.relative_to(tmp_path) for p in tmp_path.rglob("*") if p.is_file())
    assert len(made) >= 65
    for relative in made:
        assert (tmp_path / relative).read_bytes() == (SAMPLES / relative).read_bytes(), relative
    total = sum(p.stat().st_size for p in SAMPLES.rglob("*") if p.is_file())
    assert total < 3 * 1024 ** 2
