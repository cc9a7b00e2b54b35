"""Preferred values (IEC 60063) and part libraries.

The E-series tables below are typed in from /work/shared/reference/REFERENCES.md section 2
(IEC 60063:2015 Tables 1 and 2; from memory there, cross-checked entry by entry against
the PyPI package eseries 1.2.1: cases ESERIES-E3 ... ESERIES-E192). They are written out
again here, as integers, on purpose: the test compares two independent copies.
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from pipeline.elements import PartModel, part_impedance
from pipeline.errors import ConfigError
from pipeline.parts import (E_SERIES_NAMES, SERIES_NAMES, check_series, load_parts, mantissas,
                            nearest_standard, neighbours, standard_values)

# ESERIES-* (IEC 60063:2015 via REFERENCES.md section 2), mantissa x 10 or x 100.
IEC_60063 = {
    "E3": [10, 22, 47],
    "E6": [10, 15, 22, 33, 47, 68],
    "E12": [10, 12, 15, 18, 22, 27, 33, 39, 47, 56, 68, 82],
    "E24": [10, 11, 12, 13, 15, 16, 18, 20, 22, 24, 27, 30, 33, 36, 39, 43, 47, 51, 56, 62, 68,
            75, 82, 91],
    "E48": [100, 105, 110, 115, 121, 127, 133, 140, 147, 154, 162, 169, 178, 187, 196, 205, 215,
            226, 237, 249, 261, 274, 287, 301, 316, 332, 348, 365, 383, 402, 422, 442, 464, 487,
            511, 536, 562, 590, 619, 649, 681, 715, 750, 787, 825, 866, 909, 953],
    "E96": [100, 102, 105, 107, 110, 113, 115, 118, 121, 124, 127, 130, 133, 137, 140, 143, 147,
            150, 154, 158, 162, 165, 169, 174, 178, 182, 187, 191, 196, 200, 205, 210, 215, 221,
            226, 232, 237, 243, 249, 255, 261, 267, 274, 280, 287, 294, 301, 309, 316, 324, 332,
            340, 348, 357, 365, 374, 383, 392, 402, 412, 422, 432, 442, 453, 464, 475, 487, 499,
            511, 523, 536, 549, 562, 576, 590, 604, 619, 634, 649, 665, 681, 698, 715, 732, 750,
            768, 787, 806, 825, 845, 866, 887, 909, 931, 953, 976],
    "E192": [100, 101, 102, 104, 105, 106, 107, 109, 110, 111, 113, 114, 115, 117, 118, 120, 121,
             123, 124, 126, 127, 129, 130, 132, 133, 135, 137, 138, 140, 142, 143, 145, 147, 149,
             150, 152, 154, 156, 158, 160, 162, 164, 165, 167, 169, 172, 174, 176, 178, 180, 182,
             184, 187, 189, 191, 193, 196, 198, 200, 203, 205, 208, 210, 213, 215, 218, 221, 223,
             226, 229, 232, 234, 237, 240, 243, 246, 249, 252, 255, 258, 261, 264, 267, 271, 274,
             277, 280, 284, 287, 291, 294, 298, 301, 305, 309, 312, 316, 320, 324, 328, 332, 336,
             340, 344, 348, 352, 357, 361, 365, 370, 374, 379, 383, 388, 392, 397, 402, 407, 412,
             417, 422, 427, 432, 437, 442, 448, 453, 459, 464, 470, 475, 481, 487, 493, 499, 505,
             511, 517, 523, 530, 536, 542, 549, 556, 562, 569, 576, 583, 590, 597, 604, 612, 619,
             626, 634, 642, 649, 657, 665, 673, 681, 690, 698, 706, 715, 723, 732, 741, 750, 759,
             768, 777, 787, 796, 806, 816, 825, 835, 845, 856, 866, 876, 887, 898, 909, 920, 931,
             942, 953, 965, 976, 988],
}

# ESERIES-EXCEPTIONS: where the table differs from round-half-up(10**(i/n)).
FORMULA_EXCEPTIONS = {
    "E6": [3.3, 4.7], "E12": [2.7, 3.3, 3.9, 4.7, 8.2],
    "E24": [2.7, 3.0, 3.3, 3.6, 3.9, 4.3, 4.7, 8.2], "E48": [], "E96": [], "E192": [9.2],
}


def _formula(n: int) -> np.ndarray:
    """round-half-up(10**(i/n)) to 2 significant digits (n <= 24) or 3 (n >= 48)."""
    digits = 1 if n <= 24 else 2
    return np.array([math.floor(10 ** (i / n) * 10 ** digits + 0.5) / 10 ** digits for i in range(n)])


# --- E-series ---------------------------------------------------------------------------

@pytest.mark.parametrize("series", list(IEC_60063))
def test_tables_equal_iec_60063(series):
    table = IEC_60063[series]
    expected = np.array(table) / (10 if table[0] == 10 else 100)
    assert mantissas(series).tolist() == expected.tolist()
    assert len(table) == int(series[1:])


@pytest.mark.parametrize("series", [s for s in FORMULA_EXCEPTIONS])
def test_tables_are_tables_not_the_formula(series):
    # ESERIES-EXCEPTIONS: E24 differs from round(10**(i/24)) at 2.7, 3.0, ..., 8.2, so the
    # series must be stored as a table.
    table, formula = mantissas(series), _formula(int(series[1:]))
    differs = table[~np.isclose(table, formula)]
    assert differs.tolist() == FORMULA_EXCEPTIONS[series]


def test_series_names():
    assert E_SERIES_NAMES == ("E3", "E6", "E12", "E24", "E48", "E96", "E192")
    assert SERIES_NAMES == ("ideal",) + E_SERIES_NAMES
    assert check_series("e24") == "E24" and check_series("IDEAL") == "ideal"
    with pytest.raises(ConfigError, match="unknown part series 'E13'"):
        check_series("E13")


def test_standard_values_span_decades():
    values = standard_values("E12", 1e-12, 10e-12)
    expected = [1.0, 1.2, 1.5, 1.8, 2.2, 2.7, 3.3, 3.9, 4.7, 5.6, 6.8, 8.2, 10.0]
    assert values == pytest.approx(np.array(expected) * 1e-12, rel=1e-12)
    assert 39e-9 in standard_values("E24", 10e-9, 100e-9)       # the float a user writes
    assert np.all(np.diff(standard_values("E192", 1e-13, 1e-6)) > 0)
    assert standard_values("E3", 5e-9, 9e-9).size == 0


def test_nearest_is_by_ratio():
    # ESERIES-NEAREST-CONVENTION: 1.345 -> 1.5 by ratio (1.2 by linear distance); the
    # geometric midpoint of 1.2 and 1.5 is 1.3416.
    assert nearest_standard(1.345, "E12") == 1.5
    assert nearest_standard(1.341, "E12") == 1.2
    assert nearest_standard(2.3456e-9, "ideal") == 2.3456e-9


def test_pozar_values_snap_to_e24():
    # ESERIES-SNAP-EXAMPLES: Pozar Ex 5.1 exact values -> 0.91 pF, 39 nH, 47 nH, 2.7 pF.
    exact = [9.22773830099771e-13, 3.89848400616838e-08, 4.613869150498855e-08, 2.5989893374455867e-12]
    assert nearest_standard(np.array(exact), "E24").tolist() == [0.91e-12, 39e-9, 47e-9, 2.7e-12]


def test_neighbours():
    assert neighbours(40e-9, "E24").tolist() == [36e-9, 39e-9, 43e-9, 47e-9]
    assert neighbours(39e-9, "E24", n=1).tolist() == [39e-9, 43e-9]   # itself counts as below
    assert neighbours(9.5e-12, "E12", n=2).tolist() == [6.8e-12, 8.2e-12, 10e-12, 12e-12]
    assert neighbours(3.3e-9, "ideal").tolist() == [3.3e-9]


# --- part libraries ---------------------------------------------------------------------

def test_ideal_library():
    lib = load_parts("ideal")
    assert lib.name == "ideal" and lib.is_ideal
    assert lib.model_for("inductor", 10e-9) == PartModel()
    assert lib.model_for("capacitor", 1e-12).is_ideal
    assert lib.ranges["inductor"][0] == 0.5e-9 and lib.ranges["capacitor"][0] == 0.1e-12
    # capacitor: +-0.1 pF below 10 pF, +-5 % from 10 pF up (common practice)
    assert lib.tolerance_for("capacitor", [2.2e-12, 47e-12]) == pytest.approx([0.1e-12, 2.35e-12])
    assert lib.tolerance_for("inductor", 10e-9) == pytest.approx(0.5e-9)


def test_generic_0402_models():
    lib = load_parts("generic-0402")
    assert not lib.is_ideal
    ind = lib.model_for("inductor", 10e-9)
    assert ind.q == 35.0 and ind.q_ref_hz == 1e9 and ind.esr_ohm is None
    # srf = 1/(2 pi sqrt(L Cp)), Cp = 0.07 pF
    assert ind.srf_hz == pytest.approx(1 / (2 * math.pi * math.sqrt(10e-9 * 0.07e-12)), rel=1e-12)
    cap = lib.model_for("capacitor", 10e-12)
    assert cap.esr_ohm == 0.3 and cap.q is None
    assert cap.srf_hz == pytest.approx(1 / (2 * math.pi * math.sqrt(0.4e-9 * 10e-12)), rel=1e-12)
    assert lib.tolerance_for("inductor", [3.3e-9, 22e-9]) == pytest.approx([0.3e-9, 1.1e-9])


def test_model_arrays_feed_part_impedance():
    lib = load_parts("generic-0402")
    values = np.array([2.2e-9, 10e-9, 47e-9])[:, None]
    f = np.linspace(0.5e9, 3e9, 7)
    z = part_impedance("inductor", values, f, **lib.model_arrays("inductor", values))
    for row, v in zip(z, values[:, 0]):
        m = lib.model_for("inductor", v)
        one = part_impedance("inductor", v, f, q=m.q, q_ref_hz=m.q_ref_hz, srf_hz=m.srf_hz)
        np.testing.assert_allclose(row, one, rtol=1e-13)
    # Q at the reference frequency below self-resonance: X/R of the series branch = q
    w = 2 * math.pi * 1e9
    zl = part_impedance("inductor", 10e-9, 1e9, q=35.0, q_ref_hz=1e9)
    assert zl.imag / zl.real == pytest.approx(35.0) and zl.imag == pytest.approx(w * 10e-9)


def test_as_dict_is_json_ready():
    import json
    d = load_parts("generic-0402").as_dict()
    assert json.loads(json.dumps(d)) == d
    assert d["name"] == "generic-0402" and d["inductor"]["cp_f"] == 0.07e-12
    assert d["capacitor"]["esl_h"] == 0.4e-9


GOOD = """
[inductor]
min = 1e-9
max = 100e-9
tolerance = 0.05
[capacitor]
min = 0.2e-12
max = 100e-12
tolerance = 0.05
"""


def _write(tmp_path, text):
    path = tmp_path / "lib.toml"
    path.write_text(text, encoding="utf-8")
    return path


def test_library_from_a_path(tmp_path):
    lib = load_parts(_write(tmp_path, GOOD))
    assert lib.name == "lib" and lib.is_ideal and lib.path.endswith("lib.toml")


@pytest.mark.parametrize("text, key, message", [
    (GOOD.replace("tolerance = 0.05\n[cap", "tolerance = 0.05\nqq = 3\n[cap"), "inductor.qq", "unknown key"),
    (GOOD.replace("min = 1e-9", "min = -1e-9"), "inductor.min", "positive number"),
    (GOOD + "esr_ohm = -0.2\n", "capacitor.esr_ohm", "number >= 0"),
    (GOOD.replace("max = 100e-12", "max = 'big'"), "capacitor.max", "positive number"),
    (GOOD.replace("max = 100e-9", "max = 0.5e-9"), "inductor.max", "must be above min"),
    (GOOD + "q = 300.0\n", "capacitor.q", "q and q_ref_hz go together"),
    (GOOD + "q = 300.0\nq_ref_hz = 1e9\nesr_ohm = 0.1\n", "capacitor.esr_ohm", "not both"),
    (GOOD.replace("tolerance = 0.05\n[cap", "tolerance = 5\n[cap"), "inductor.tolerance", "below 1"),
    (GOOD + "tolerance_abs = 0.1e-12\n", "capacitor.tolerance_abs", "go together"),
    (GOOD.replace("tolerance = 0.05\n[cap", "[cap"), "inductor.tolerance", "missing"),
    ("colour = 'red'\n" + GOOD, "colour", "unknown key"),
])
def test_bad_library_names_file_and_key(tmp_path, text, key, message):
    path = _write(tmp_path, text)
    with pytest.raises(ConfigError) as caught:
        load_parts(path)
    line = str(caught.value)
    assert str(path) in line and f"{key}:" in line and message in line and "\n" not in line


def test_missing_section_and_unknown_name(tmp_path):
    with pytest.raises(ConfigError, match=r"missing \[capacitor\] section"):
        load_parts(_write(tmp_path, GOOD.split("[capacitor]")[0]))
    with pytest.raises(ConfigError, match="available: .*generic-0402.*ideal"):
        load_parts("no-such-family")
