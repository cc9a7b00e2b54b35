"""Make the sample Touchstone files in this folder (invented antennas, fixed seed).

Run from the repository root:  python3 sample_measurements/make_samples.py [OUT_DIR]
(OUT_DIR defaults to this folder).

Every antenna is a lumped model with a radiation resistance that is not 50 ohm, written
with scikit-rf (``Network.write_touchstone``) after adding analyzer-like noise about
-50 dB below full reflection. The scenario and every name in it are invented:

* the Larkspur soil-moisture node: a 915 MHz ISM-band PCB meander antenna;
* the Wren asset tag: a 2.4 GHz chip antenna on a small board, measured at the antenna
  and again at the end of a 40 mm FR-4 microstrip lead-in (de-embedding matters);
* the Wren gateway: two chip antennas swept as one 2-port, the one to match on port 2;
* the Heron meter: an 868 MHz helical whip, exported as Z-parameters (Touchstone 2);
* lot-915/: a production lot of Larkspur antennas with unit-to-unit spread, a few
  detuned units and one file cut short by an interrupted transfer.

Model (per antenna): a series R-L-C whose resistance is radiation (rising as f**2, as
for an electrically short radiator) plus a constant loss, tuned to series resonance
``fs`` with quality factor ``q``; feed details (a series feed inductance, a shunt pad
capacitance) in front of it. See README.md here for the values.
"""

from __future__ import annotations

import shutil
import sys
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np
import skrf
from skrf.media import DefinedGammaZ0

HERE = Path(__file__).resolve().parent
SEED = 20240915
Z0 = 50.0
NOISE_DB = -50.0                   # analyzer trace noise, relative to |S11| = 1
C_LIGHT = 299_792_458.0            # m/s
DIGITS = {"format_spec_A": "{:.6f}", "format_spec_B": "{:.6f}", "format_spec_freq": "{:.0f}"}


@dataclass(frozen=True)
class Antenna:
    """Lumped antenna model; SI units. Impedance seen at the feed pad."""

    fs_hz: float              # series resonance of the radiator
    r_rad_ohm: float          # radiation resistance at fs (scales as (f/fs)**2)
    r_loss_ohm: float         # conductor/dielectric loss, constant
    q: float                  # unloaded Q of the series R-L-C at fs
    l_feed_h: float = 0.0     # series feed inductance (trace to the radiator)
    c_pad_f: float = 0.0      # shunt pad capacitance at the feed

    def impedance(self, freq_hz: np.ndarray) -> np.ndarray:
        w, ws = 2 * np.pi * freq_hz, 2 * np.pi * self.fs_hz
        r_total = self.r_rad_ohm + self.r_loss_ohm
        l_series = self.q * r_total / ws
        c_series = 1 / (ws ** 2 * l_series)
        resistance = self.r_rad_ohm * (freq_hz / self.fs_hz) ** 2 + self.r_loss_ohm
        z = resistance + 1j * w * (l_series + self.l_feed_h) + 1 / (1j * w * c_series)
        return 1 / (1 / z + 1j * w * self.c_pad_f)


LARKSPUR = Antenna(fs_hz=950e6, r_rad_ohm=15.0, r_loss_ohm=3.0, q=10.0, c_pad_f=0.6e-12)
WREN_CHIP = Antenna(fs_hz=2.60e9, r_rad_ohm=24.0, r_loss_ohm=2.0, q=7.0, l_feed_h=0.8e-9,
                    c_pad_f=0.35e-12)
WREN_CHIP_A = Antenna(fs_hz=2.50e9, r_rad_ohm=30.0, r_loss_ohm=2.5, q=6.0, l_feed_h=0.5e-9,
                      c_pad_f=0.25e-12)
HERON_WHIP = Antenna(fs_hz=880e6, r_rad_ohm=11.0, r_loss_ohm=1.5, q=15.0, c_pad_f=0.4e-12)

# 40 mm FR-4 microstrip lead-in: eps_eff 3.3, 50 ohm, 0.1 dB/cm at 2.45 GHz (dielectric
# loss, proportional to f). Common-practice figures for 1.6 mm FR-4.
LEAD_LENGTH_M = 0.040
LEAD_EPS_EFF = 3.3
LEAD_LOSS_DB_PER_M_AT = (10.0, 2.45e9)


def frequency(start_hz: float, stop_hz: float, points: int) -> skrf.Frequency:
    return skrf.Frequency.from_f(np.linspace(start_hz, stop_hz, points), unit="Hz")


def noise(rng: np.random.Generator, shape) -> np.ndarray:
    """Complex Gaussian trace noise with RMS magnitude 10**(NOISE_DB/20)."""
    sigma = 10 ** (NOISE_DB / 20) / np.sqrt(2)
    return rng.normal(0, sigma, shape) + 1j * rng.normal(0, sigma, shape)


def reflection(z: np.ndarray) -> np.ndarray:
    return (z - Z0) / (z + Z0)


def one_port(freq: skrf.Frequency, s11: np.ndarray, comments: str) -> skrf.Network:
    return skrf.Network(frequency=freq, s=s11.reshape(-1, 1, 1), z0=Z0, comments=comments)


def lead_in(freq: skrf.Frequency) -> skrf.Network:
    """The 40 mm microstrip as a 2-port (port 1 at the analyzer, port 2 at the antenna)."""
    f = freq.f
    beta = 2 * np.pi * f * np.sqrt(LEAD_EPS_EFF) / C_LIGHT
    loss_db_per_m, f_ref = LEAD_LOSS_DB_PER_M_AT
    alpha = loss_db_per_m / (20 * np.log10(np.e)) * f / f_ref      # Np/m
    media = DefinedGammaZ0(frequency=freq, z0=Z0, gamma=alpha + 1j * beta)
    return media.line(LEAD_LENGTH_M, unit="m")


def write(network: skrf.Network, path: Path, **options) -> Path:
    network.write_touchstone(str(path), skrf_comment=False, **DIGITS, **options)
    return path


def make_single_units(rng: np.random.Generator, out: Path) -> None:
    freq = frequency(700e6, 1.1e9, 801)
    s11 = reflection(LARKSPUR.impedance(freq.f)) + noise(rng, freq.npoints)
    write(one_port(freq, s11, "Larkspur soil-moisture node, 915 MHz PCB meander antenna "
                              "(synthetic sample data)"), out / "larkspur_915.s1p")

    freq = frequency(2.2e9, 2.7e9, 501)
    gamma_antenna = reflection(WREN_CHIP.impedance(freq.f))
    write(one_port(freq, gamma_antenna + noise(rng, freq.npoints),
                   "Wren asset tag, 2.4 GHz chip antenna, measured at the antenna feed "
                   "(synthetic sample data)"), out / "wren_chip_2g4.s1p")
    through_lead = lead_in(freq) ** one_port(freq, gamma_antenna, "")
    write(one_port(freq, through_lead.s[:, 0, 0] + noise(rng, freq.npoints),
                   "Wren asset tag, the same chip antenna measured at the end of a 40 mm "
                   "FR-4 microstrip lead-in (eps_eff 3.3, 50 ohm, 0.1 dB/cm at 2.45 GHz) "
                   "(synthetic sample data)"), out / "wren_chip_2g4_lead40mm.s1p")

    freq = frequency(2.2e9, 2.7e9, 201)
    s = np.empty((freq.npoints, 2, 2), dtype=complex)
    s[:, 0, 0] = reflection(WREN_CHIP_A.impedance(freq.f))
    s[:, 1, 1] = reflection(WREN_CHIP.impedance(freq.f))
    coupling = 10 ** (-22 / 20) * np.exp(-2j * np.pi * freq.f * 0.35e-9)    # -22 dB, 350 ps
    s[:, 0, 1] = s[:, 1, 0] = coupling
    s = s + noise(rng, s.shape)
    gateway = skrf.Network(frequency=freq, s=s, z0=Z0,
                           comments="Wren gateway, two chip antennas; port 1 antenna A, "
                                    "port 2 antenna B (synthetic sample data)")
    write(gateway, out / "wren_gateway_2port.s2p")

    freq = frequency(800e6, 950e6, 301)
    s11 = reflection(HERON_WHIP.impedance(freq.f)) + noise(rng, freq.npoints)
    write(one_port(freq, s11, "Heron meter, 868 MHz helical whip, Z-parameters in ohms "
                              "(synthetic sample data)"), out / "heron_whip_868_z.ts",
          parameter="Z", version="2.0")


LOT_UNITS = 64
LOT_DETUNED = {11: -0.060, 27: -0.052, 46: +0.055, 58: -0.068}    # unit index -> fs shift
LOT_TRUNCATED = 37                                                # transfer cut short


def make_lot(rng: np.random.Generator, out: Path) -> None:
    """lot-915/: LKS-0001 ... LKS-0064 plus spread, detuned units and one cut-off file."""
    folder = out / "lot-915"
    shutil.rmtree(folder, ignore_errors=True)
    folder.mkdir()
    freq = frequency(700e6, 1.1e9, 401)
    for index in range(1, LOT_UNITS + 1):
        resonance_shift = LOT_DETUNED.get(index, np.clip(rng.normal(0, 0.005), -0.015, 0.015))
        resistance_scale = 1 + np.clip(rng.normal(0, 0.035), -0.10, 0.10)
        unit = replace(LARKSPUR, fs_hz=LARKSPUR.fs_hz * (1 + resonance_shift),
                       r_rad_ohm=LARKSPUR.r_rad_ohm * resistance_scale)
        s11 = reflection(unit.impedance(freq.f)) + noise(rng, freq.npoints)
        name = f"LKS-{index:04d}"
        path = write(one_port(freq, s11, f"Larkspur soil-moisture node, lot 915-A, unit {name} "
                                         "(synthetic sample data)"), folder / f"{name}.s1p")
        if index == LOT_TRUNCATED:
            cut_off(path, keep_fraction=0.6)


def cut_off(path: Path, keep_fraction: float) -> None:
    """Rewrite ``path`` as an interrupted transfer leaves it: the last row stops mid-way."""
    lines = path.read_text(encoding="ascii").splitlines()
    keep = int(len(lines) * keep_fraction)
    partial = " ".join(lines[keep].split()[:2])          # frequency and the real part only
    path.write_text("\n".join(lines[:keep] + [partial]), encoding="ascii")


OPEN_FRINGE_F = 20e-15            # fringing capacitance of the open end of the lead-in


def make_fixture_standard(rng: np.random.Generator, out: Path) -> None:
    """lead40mm_open.s1p: the 40 mm lead-in with its far end left open (for fixture fit)."""
    freq = frequency(2.2e9, 2.7e9, 501)
    open_end = reflection(1 / (1j * 2 * np.pi * freq.f * OPEN_FRINGE_F))
    through_lead = lead_in(freq) ** one_port(freq, open_end, "")
    write(one_port(freq, through_lead.s[:, 0, 0] + noise(rng, freq.npoints),
                   "Wren asset tag fixture: the 40 mm FR-4 lead-in left open where the antenna "
                   "goes (20 fF fringing) (synthetic sample data)"), out / "lead40mm_open.s1p")


def main(out: Path = HERE) -> None:
    """Write every sample file under ``out`` (the lot folder is replaced)."""
    rng = np.random.default_rng(SEED)
    out.mkdir(parents=True, exist_ok=True)
    make_single_units(rng, out)
    make_lot(rng, out)
    make_fixture_standard(np.random.default_rng(SEED + 1), out)   # own stream: others unchanged


if __name__ == "__main__":
    main(Path(sys.argv[1]) if len(sys.argv) > 1 else HERE)
