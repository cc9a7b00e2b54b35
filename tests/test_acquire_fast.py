"""The plain one-port fast path of pipeline.acquire agrees with scikit-rf, the reference.

scikit-rf (skrf.Network + renormalize) reads the same files; the fast path must give the
same frequencies and S11 (1e-12), and files it does not handle must go to scikit-rf.
"""

from __future__ import annotations

import numpy as np
import pytest
import skrf

from pipeline.acquire import _plain_one_port, read_sweep


SCALE = {"hz": 1.0, "khz": 1e3, "mhz": 1e6, "ghz": 1e9}


def _network(r_ohm: float, unit: str) -> skrf.Network:
    """An invented one-port, written by scikit-rf with frequencies in ``unit``."""
    rng = np.random.default_rng(3)
    f = np.linspace(700e6, 1.1e9, 41)
    s = 0.7 * np.exp(1j * np.linspace(-3, 3, 41)) + rng.normal(0, 0.01, 41)
    freq = skrf.Frequency.from_f(f / SCALE[unit], unit=unit)
    return skrf.Network(frequency=freq, s=s.reshape(-1, 1, 1), z0=r_ohm)


@pytest.mark.parametrize("form", ["ri", "ma", "db"])
@pytest.mark.parametrize("unit", ["hz", "khz", "mhz", "ghz"])
@pytest.mark.parametrize("r_ohm", [50.0, 75.0])
def test_fast_path_equals_scikit_rf(tmp_path, form, unit, r_ohm):
    path = tmp_path / "unit.s1p"
    _network(r_ohm, unit).write_touchstone(str(path), form=form, skrf_comment=False)
    text = path.read_text()
    assert f"# {unit} s {form} r".lower() in text.lower()
    fast = _plain_one_port(text, ".s1p", 50.0)
    assert fast is not None                                  # the fast path was taken
    reference = skrf.Network(str(path))
    reference.renormalize(50.0)
    np.testing.assert_allclose(fast[0], reference.f, rtol=1e-12)
    np.testing.assert_allclose(fast[1], reference.s[:, 0, 0], atol=1e-12)
    sweep = read_sweep(path)
    np.testing.assert_array_equal(sweep.s11, fast[1])


@pytest.mark.parametrize("text", [
    "# MHz Z RI R 50\n100 50 0\n200 50 0\n",                  # Z parameters: scikit-rf
    "[Version] 2.0\n# MHz S RI R 50\n[Number of Ports] 1\n",   # v2 keywords
    "# MHz S RI R 50\n100 0.1 0\n100 0.2 0\n",                # duplicate frequency
    "# MHz S RI R 50\n100 0.1 abc\n",                         # non-numeric token
    "# MHz S RI R 50\n100 0.1\n",                             # short row
    "# MHz S RI R 50\n# GHz S RI R 50\n1 0.1 0\n",            # a second option line
    "# MHz S RI R 50\n100 nan 0\n",                           # NaN
])
def test_unusual_or_bad_files_go_to_scikit_rf(text):
    assert _plain_one_port(text, ".s1p", 50.0) is None


def test_default_option_line_is_ghz_s_ma_r50():
    """Touchstone spec (TS-DEFAULT-OPTION-LINE): '#' alone means GHz S MA R 50."""
    freq, s = _plain_one_port("#\n2 0.5 90\n", ".s1p", 50.0)
    assert freq[0] == 2e9 and s[0] == pytest.approx(0.5j)
