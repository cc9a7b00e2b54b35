"""``matchbay match``: the real console entry, the interfaces.md JSON, one-line errors.

Predictions are re-checked by building the reported network in scikit-rf (media lumped
elements cascaded onto the measured load), an independent path from matchbay's own
ABCD ladder.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import skrf
from skrf.media import DefinedGammaZ0

from pipeline.acquire import read_sweep, sha256_file
from pipeline.cli import main
from pipeline.parts import nearest_standard
from test_acquire import BAD_FILES, make_bad_file
from test_plots import png_size

REPO = Path(__file__).resolve().parents[1]
SAMPLES = REPO / "sample_measurements"
LARKSPUR = SAMPLES / "larkspur_915.s1p"
ENTRY = "import sys; from pipeline.cli import main; sys.exit(main())"


def run(capsys, *args: str) -> tuple[int, str, str]:
    status = main([str(a) for a in args])
    out, err = capsys.readouterr()
    return status, out, err


def run_json(capsys, *args: str) -> dict:
    status, out, err = run(capsys, *args, "--json")
    assert status == 0, err
    return json.loads(out)


def skrf_gamma(elements: list[dict], freq_hz: np.ndarray, z_load: np.ndarray, z0: float = 50.0):
    """Gamma_in of the JSON elements (ideal parts) in front of z_load, built with scikit-rf."""
    freq = skrf.Frequency.from_f(freq_hz, unit="Hz")
    media = DefinedGammaZ0(frequency=freq, z0=z0)
    build = {("series", "inductor"): media.inductor, ("series", "capacitor"): media.capacitor,
             ("shunt", "inductor"): media.shunt_inductor, ("shunt", "capacitor"): media.shunt_capacitor}
    load = skrf.Network(frequency=freq, s=((z_load - z0) / (z_load + z0)).reshape(-1, 1, 1), z0=z0)
    chain = [build[(e["position"], e["kind"])](e["value"]) for e in elements]
    return skrf.network.cascade_list(chain + [load]).s[:, 0, 0] if chain else load.s[:, 0, 0]


# --- the JSON contract -------------------------------------------------------------------

def test_band_json_shape_and_values(capsys):
    result = run_json(capsys, "match", LARKSPUR, "--band", "902M:928M")
    for key in ("source", "source_sha256", "z0_ohm", "band_hz", "return_loss_before_db", "solutions"):
        assert key in result
    assert result["source"] == str(LARKSPUR)
    assert result["source_sha256"] == sha256_file(LARKSPUR)
    assert result["z0_ohm"] == 50.0
    assert result["band_hz"] == [902e6, 928e6]
    losses = [s["return_loss_db"] for s in result["solutions"]]
    assert losses == sorted(losses, reverse=True) and losses[0] > result["return_loss_before_db"]
    for solution in result["solutions"]:
        for element in solution["elements"]:
            assert element["position"] in ("series", "shunt")
            assert element["kind"] in ("inductor", "capacitor")
            assert element["value"] == nearest_standard(element["value"], "E24")   # default series
            assert "q" not in element and "esr_ohm" not in element                 # ideal parts

    sweep = read_sweep(LARKSPUR)
    inside = sweep.band_indices((902e6, 928e6))
    rl_before = -20 * np.log10(np.abs(sweep.s11[inside]))
    # the reported worst case also covers the interpolated band edges, so it can only be lower
    assert result["return_loss_before_db"] <= rl_before.min() + 1e-9
    assert result["return_loss_before_db"] == pytest.approx(rl_before.min(), abs=0.2)
    best = result["solutions"][0]
    rl_after = -20 * np.log10(np.abs(skrf_gamma(best["elements"], sweep.freq_hz[inside], sweep.z_ohm[inside])))
    assert best["return_loss_db"] <= rl_after.min() + 1e-9
    assert best["return_loss_db"] == pytest.approx(rl_after.min(), abs=0.3)


def test_at_json_gives_exact_solutions(capsys):
    result = run_json(capsys, "match", LARKSPUR, "--at", "915MHz")
    assert result["band_hz"] == [915e6, 915e6]
    assert 1 <= len(result["solutions"]) <= 4
    sweep = read_sweep(LARKSPUR)
    gamma_915 = complex(np.interp(915e6, sweep.freq_hz, sweep.s11.real),
                        np.interp(915e6, sweep.freq_hz, sweep.s11.imag))
    assert result["return_loss_before_db"] == pytest.approx(-20 * np.log10(abs(gamma_915)), abs=1e-9)
    z_915 = 50 * (1 + gamma_915) / (1 - gamma_915)
    for solution in result["solutions"]:
        assert solution["series"] == "ideal"
        assert abs(skrf_gamma(solution["elements"], np.array([915e6]), np.array([z_915]))[0]) < 1e-9
        preview = solution["nearest_standard"]
        assert preview["series"] == "E24"
        assert [e["value"] for e in preview["elements"]] == \
               [nearest_standard(e["value"], "E24") for e in solution["elements"]]
        g = skrf_gamma(preview["elements"], np.array([915e6]), np.array([z_915]))[0]
        assert preview["return_loss_db"] == pytest.approx(-20 * np.log10(abs(g)), abs=1e-6)


def test_at_with_a_series_snaps_values(capsys):
    result = run_json(capsys, "match", LARKSPUR, "--at", "915M", "--series", "E12")
    losses = [s["return_loss_db"] for s in result["solutions"]]
    assert losses == sorted(losses, reverse=True)
    for solution in result["solutions"]:
        assert solution["series"] == "E12"
        assert "nearest_standard" not in solution
        for element in solution["elements"]:
            assert element["value"] == nearest_standard(element["value"], "E12")


def test_lossy_parts_carry_their_models(capsys):
    result = run_json(capsys, "match", LARKSPUR, "--band", "902M:928M", "--parts", "generic-0402")
    best = result["solutions"][0]
    assert 0 < best["delivered_fraction_min"] < 1
    assert any("q" in e or "esr_ohm" in e for e in best["elements"])
    assert result["parts"]["name"] == "generic-0402"


def test_two_port_file_port_2(capsys):
    result = run_json(capsys, "match", SAMPLES / "wren_gateway_2port.s2p", "--port", "2",
                      "--band", "2.4G:2.4835G")
    assert result["port"] == 2
    single = run_json(capsys, "match", SAMPLES / "wren_chip_2g4.s1p", "--band", "2.4G:2.4835G")
    assert result["return_loss_before_db"] == pytest.approx(single["return_loss_before_db"], abs=0.5)


def test_z_parameter_file(capsys):
    result = run_json(capsys, "match", SAMPLES / "heron_whip_868_z.ts", "--band", "863M:870M")
    assert result["solutions"][0]["return_loss_db"] > result["return_loss_before_db"] + 5


def test_other_z0(capsys):
    result = run_json(capsys, "match", LARKSPUR, "--at", "915M", "--z0", "75")
    assert result["z0_ohm"] == 75.0
    sweep = read_sweep(LARKSPUR, z0=75)
    g = complex(np.interp(915e6, sweep.freq_hz, sweep.s11.real), np.interp(915e6, sweep.freq_hz, sweep.s11.imag))
    assert result["return_loss_before_db"] == pytest.approx(-20 * np.log10(abs(g)), abs=1e-9)


# --- readable output and the plot ---------------------------------------------------------

def test_readable_output(capsys):
    status, out, err = run(capsys, "match", LARKSPUR, "--band", "902M:928M")
    assert status == 0 and err == ""
    assert "radio ─ " in out and " ─ antenna" in out
    assert "Return loss before matching over 902 MHz – 928 MHz" in out
    assert "nH" in out and "pF" in out and "E24" in out


def test_readable_at_shows_the_nearest_standard_pair(capsys):
    status, out, _ = run(capsys, "match", LARKSPUR, "--at", "915M")
    assert status == 0
    assert "nearest E24" in out and "> 60 dB" in out


def test_plot_is_written(capsys, tmp_path):
    png = tmp_path / "larkspur.png"
    status, out, _ = run(capsys, "match", LARKSPUR, "--band", "902M:928M", "--plot", png)
    assert status == 0 and f"plot written to {png}" in out
    assert png.stat().st_size > 20_000 and png_size(png) == (1440, 672)


# --- bad input: exit 2, one line naming the file, nothing written ------------------------

def assert_one_line_error(status: int, out: str, err: str, *, names: str, line: int | None = None):
    assert status == 2
    assert out == ""
    assert len(err.splitlines()) == 1, err
    assert "Traceback" not in err
    assert names in err
    if line is not None:
        assert f"{names}:{line}:" in err


@pytest.mark.parametrize("case", sorted(BAD_FILES))
def test_bad_file(capsys, tmp_path, case):
    path, line, words = make_bad_file(tmp_path, case)
    png = tmp_path / "out.png"
    status, out, err = run(capsys, "match", path, "--band", "902M:928M", "--plot", png)
    assert_one_line_error(status, out, err, names=str(path), line=line)
    assert words in err
    assert not png.exists()


def test_file_over_the_size_limit(capsys, tmp_path):
    status, out, err = run(capsys, "match", LARKSPUR, "--at", "915M", "--max-mb", "0.001")
    assert_one_line_error(status, out, err, names=str(LARKSPUR))
    assert "limit" in err


@pytest.mark.parametrize("args, names", [
    (["--at", "1.2G"], str(LARKSPUR)),                      # outside the sweep
    (["--at", "650M"], str(LARKSPUR)),
    (["--band", "1.0G:1.2G"], str(LARKSPUR)),
    (["--port", "2", "--at", "915M"], str(LARKSPUR)),        # a 1-port file
    (["--at", "915M", "--band", "902M:928M"], "--at/--band"),
    ([], "--at/--band"),
    (["--at", "nine"], "--at"),
    (["--band", "928M:902M"], "--band"),
    (["--at", "915M", "--series", "E7"], "--series"),
    (["--at", "915M", "--z0", "-50"], "--z0"),
    (["--at", "915M", "--parts", "no-such-library"], "no-such-library"),
])
def test_bad_options(capsys, tmp_path, args, names):
    png = tmp_path / "out.png"
    status, out, err = run(capsys, "match", LARKSPUR, *args, "--plot", png)
    assert_one_line_error(status, out, err, names=names)
    assert not png.exists()


@pytest.mark.parametrize("plot", ["missing-folder/out.png", "out.jpg"])
def test_bad_plot_path(capsys, tmp_path, plot):
    status, out, err = run(capsys, "match", LARKSPUR, "--at", "915M", "--plot", tmp_path / plot)
    assert_one_line_error(status, out, err, names=str(tmp_path / plot))
    assert list(tmp_path.iterdir()) == []


def test_warning_goes_to_stderr_and_the_match_still_runs(capsys, tmp_path):
    text = "# MHz S RI R 50\n" + "".join(f"{f} {0.4 + 0.001 * i} -0.2\n" for i, f in enumerate(range(900, 931)))
    path = tmp_path / "warm.s1p"
    path.write_text(text.replace("900 0.4 -0.2", "900 1.08 0.0"))
    status, out, err = run(capsys, "match", path, "--band", "910M:930M", "--json")
    assert status == 0
    assert json.loads(out)["solutions"]
    assert err.startswith("matchbay: warning: ") and "1.080" in err


# --- the real console, in a child process --------------------------------------------------

def _commands() -> list[list[str]]:
    commands = [[sys.executable, "-c", ENTRY]]
    if shutil.which("matchbay"):
        commands.append([shutil.which("matchbay")])
    return commands


@pytest.mark.parametrize("command", _commands(), ids=lambda c: Path(c[0]).name)
def test_subprocess(command, tmp_path):
    good = subprocess.run(command + ["match", str(LARKSPUR), "--at", "915M", "--json"], cwd=REPO,
                          capture_output=True, text=True, timeout=120)
    assert good.returncode == 0, good.stderr
    assert json.loads(good.stdout)["band_hz"] == [915e6, 915e6]

    bad, line, _ = make_bad_file(tmp_path, "non_numeric")
    failed = subprocess.run(command + ["match", str(bad), "--band", "902M:928M"], cwd=REPO,
                            capture_output=True, text=True, timeout=120)
    assert_one_line_error(failed.returncode, failed.stdout, failed.stderr, names=str(bad), line=line)
