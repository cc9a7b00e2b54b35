"""De-embedding: move a sweep's reference plane from the analyzer port to the antenna feed.

An antenna on a test fixture is measured through a connector, a length of coax or
microstrip, perhaps an adapter. A match computed at the connector is wrong at the antenna
(40 mm of FR-4 microstrip, eps_eff 3.3, turns the reflection through about 420 degrees at
2.4 GHz, there and back), so every matching command removes the fixture first.

A fixture is a :class:`FixtureChain` of steps listed **from the analyzer port toward the
device**. Each step is a 2-port with port 1 on the analyzer side and port 2 on the device
side, and has:

- ``remove(freq_hz, s11, z0) -> s11``: the reflection at the step's device-side plane,
  given the reflection at its analyzer-side plane (pure numpy, vectorised);
- ``network(freq_hz, z0) -> skrf.Network``: the step as a scikit-rf 2-port, the
  independent check of ``remove`` (``network.inv ** measured``) and the way to look at it;
- ``describe() -> dict``: JSON-ready parameters in SI units with a ``"type"`` key, recorded
  in every result's provenance.

Conventions (state them wherever a number is shown):

- **Loss is the one-way insertion loss of the fixture, in dB** (positive). The reflection
  passes the fixture twice, so a 1 dB fixture makes the return loss look 2 dB better
  (reference TL-LOSSY-RL).
- **Sign:** removing a step moves the reference plane toward the device. For a matched,
  lossless delay tau: S11_dut = S11_meas * exp(+j 2 w tau) (reference
  TL-PORT-EXTENSION-1PORT; Pozar 4th ed. Sec. 4.3, shift of reference planes).
- A 1-port behind a 2-port fixture S is recovered with the closed form
  Gamma = (Gm - S11) / (S22 (Gm - S11) + S12 S21), which equals scikit-rf's
  ``fixture.inv ** measured`` (library-facts.md Sec. 1.2) at a fraction of its cost.

Chains are declared in TOML files under ``configs/fixtures/`` (see :func:`load_chain`) or
built from command-line flags for the simple cases (:func:`chain_for_cli`).
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
import os
import re
import tempfile
from dataclasses import MISSING, dataclass, field, fields
from pathlib import Path
from typing import ClassVar

import numpy as np
from scipy.constants import c as SPEED_OF_LIGHT_M_PER_S

from pipeline.config import check_keys, load_toml, resolve
from pipeline.errors import ConfigError, MatchbayError
from pipeline.sweep import Sweep
from pipeline.units import format_si, parse_frequency, parse_quantity

NEPER_DB = 20.0 / math.log(10.0)      # 8.686 dB per neper
MAX_FIXTURE_PHASE_STEP_DEG = 45.0     # coarser fixture files cannot be interpolated reliably
_COVER_SLACK = 1e-9                   # relative slack on the fixture file's frequency range


# --------------------------------------------------------------------------------------
# shared helpers


def _finite(value, key: str) -> float:
    try:
        number = float(value)
    except (TypeError, ValueError):
        raise ConfigError(f"must be a number, got {value!r}", key=key) from None
    if not math.isfinite(number):
        raise ConfigError(f"must be finite, got {value!r}", key=key)
    return number


def _non_negative(value, key: str) -> float:
    number = _finite(value, key)
    if number < 0:
        raise ConfigError(f"must not be negative, got {number:g}", key=key)
    return number


def _positive(value, key: str) -> float:
    number = _finite(value, key)
    if not number > 0:
        raise ConfigError(f"must be positive, got {number:g}", key=key)
    return number


def velocity_factor_of(velocity_factor: float | None, eps_eff: float | None) -> float:
    """The velocity factor from exactly one of ``velocity_factor`` (0, 1] or ``eps_eff`` >= 1.

    VF = 1/sqrt(eps_eff) for a TEM or quasi-TEM line (reference TL-VELOCITY-FACTOR).
    """
    if (velocity_factor is None) == (eps_eff is None):
        raise ConfigError("give exactly one of velocity_factor and eps_eff", key="velocity_factor")
    if velocity_factor is not None:
        vf = _finite(velocity_factor, "velocity_factor")
        if not 0 < vf <= 1:
            raise ConfigError(f"must be in (0, 1], got {vf:g}", key="velocity_factor")
        return vf
    eps = _finite(eps_eff, "eps_eff")
    if eps < 1:
        raise ConfigError(f"must be at least 1, got {eps:g}", key="eps_eff")
    return 1.0 / math.sqrt(eps)


def _check_reference(loss_at_ref: float, loss_ref_hz, *, loss_key: str) -> float | None:
    """A loss stated at a frequency needs that frequency; returns it (Hz) or None."""
    if loss_ref_hz is None:
        if loss_at_ref != 0:
            raise ConfigError("a loss at a reference frequency needs loss_ref_hz", key=loss_key)
        return None
    return _positive(loss_ref_hz, "loss_ref_hz")


def remove_two_port(s11_meas: np.ndarray, s11, s21s12, s22) -> np.ndarray:
    """Reflection behind a 2-port fixture: (Gm - S11) / (S22 (Gm - S11) + S12 S21).

    Solves Gm = S11 + S12 S21 G / (1 - S22 G) for G (the standard 1-port de-embedding;
    equal to scikit-rf ``fixture.inv ** measured``, checked in tests).
    """
    difference = s11_meas - s11
    return difference / (s22 * difference + s21s12)


def _matched_two_port(freq_hz: np.ndarray, s21: np.ndarray, z0: float):
    """A reflectionless, reciprocal skrf 2-port with transmission ``s21``."""
    import skrf

    s = np.zeros((freq_hz.size, 2, 2), dtype=complex)
    s[:, 1, 0] = s[:, 0, 1] = s21
    return skrf.Network(frequency=skrf.Frequency.from_f(freq_hz, unit="Hz"), s=s, z0=z0)


# --------------------------------------------------------------------------------------
# the three kinds of step


@dataclass(frozen=True)
class PortExtension:
    """An electrical delay with optional loss: a matched, reflectionless fixture.

    delay_s        : one-way delay tau of the fixture, s (>= 0).
    loss_db_dc     : one-way loss at 0 Hz, dB (>= 0).
    loss_db_at_ref : one-way loss at ``loss_ref_hz``, dB (>= loss_db_dc).
    loss_ref_hz    : frequency where ``loss_db_at_ref`` holds, Hz; None for a
                     frequency-independent loss (then ``loss_db_at_ref`` must be 0).

    One-way loss L(f) = loss_db_dc + (loss_db_at_ref - loss_db_dc) * sqrt(f / loss_ref_hz).
    Removing it multiplies S11 by exp(+j 2 w tau) * 10**(2 L(f) / 20).
    """

    TYPE: ClassVar[str] = "port_extension"

    delay_s: float
    loss_db_dc: float = 0.0
    loss_db_at_ref: float = 0.0
    loss_ref_hz: float | None = None

    def __post_init__(self):
        object.__setattr__(self, "delay_s", _non_negative(self.delay_s, "delay_s"))
        dc = _non_negative(self.loss_db_dc, "loss_db_dc")
        at_ref = _non_negative(self.loss_db_at_ref, "loss_db_at_ref")
        ref = _check_reference(at_ref, self.loss_ref_hz, loss_key="loss_db_at_ref")
        if ref is not None and at_ref < dc:
            raise ConfigError(f"must not be below loss_db_dc ({at_ref:g} < {dc:g} dB)",
                              key="loss_db_at_ref")
        object.__setattr__(self, "loss_db_dc", dc)
        object.__setattr__(self, "loss_db_at_ref", at_ref)
        object.__setattr__(self, "loss_ref_hz", ref)

    @classmethod
    def from_length(cls, length_m: float, *, velocity_factor: float | None = None,
                    eps_eff: float | None = None, loss_db_dc: float = 0.0,
                    loss_db_at_ref: float = 0.0, loss_ref_hz: float | None = None) -> "PortExtension":
        """From an electrical length (m) and a velocity factor or eps_eff: tau = l / (VF c)."""
        length = _non_negative(length_m, "length_m")
        vf = velocity_factor_of(velocity_factor, eps_eff)
        return cls(length / (vf * SPEED_OF_LIGHT_M_PER_S), loss_db_dc, loss_db_at_ref, loss_ref_hz)

    def loss_db(self, freq_hz) -> np.ndarray:
        """One-way loss in dB at each frequency."""
        f = np.asarray(freq_hz, dtype=float)
        if self.loss_ref_hz is None:
            return np.full(f.shape, self.loss_db_dc)
        slope = self.loss_db_at_ref - self.loss_db_dc
        return self.loss_db_dc + slope * np.sqrt(f / self.loss_ref_hz)

    def transmission(self, freq_hz) -> np.ndarray:
        """S21 = S12 of the extension: 10**(-L/20) exp(-j w tau)."""
        f = np.asarray(freq_hz, dtype=float)
        return 10 ** (-self.loss_db(f) / 20) * np.exp(-2j * np.pi * f * self.delay_s)

    def remove(self, freq_hz, s11, z0: float = 50.0) -> np.ndarray:
        """S11 with the plane moved through the extension toward the device (z0 unused)."""
        return np.asarray(s11) / self.transmission(freq_hz) ** 2

    def network(self, freq_hz, z0: float = 50.0):
        """The extension as a matched skrf 2-port at ``z0``."""
        f = np.asarray(freq_hz, dtype=float)
        return _matched_two_port(f, self.transmission(f), z0)

    def describe(self) -> dict:
        return {"type": self.TYPE, "delay_s": self.delay_s, "loss_db_dc": self.loss_db_dc,
                "loss_db_at_ref": self.loss_db_at_ref, "loss_ref_hz": self.loss_ref_hz}


@dataclass(frozen=True)
class FixtureLine:
    """A uniform transmission line of its own characteristic impedance.

    length_m           : physical length, m (>= 0).
    z0_ohm             : the line's characteristic impedance, ohm (may differ from the
                         sweep's reference; it is then removed exactly, not as a delay).
    velocity_factor    : v / c in (0, 1]; or give ``eps_eff`` (>= 1) instead.
    loss_db_per_m      : attenuation constant alpha at ``loss_ref_hz``, dB/m (the matched
                         line's loss per metre, one way).
    loss_ref_hz        : frequency where ``loss_db_per_m`` holds, Hz.
    conductor_fraction : share of that loss that is conductor loss (scales with sqrt(f));
                         the rest is dielectric loss (scales with f). Default 1.

    alpha(f) = loss_db_per_m / 8.686 * (cf sqrt(f/f_ref) + (1 - cf) f/f_ref)  Np/m,
    beta(f)  = 2 pi f / (VF c)  rad/m.
    """

    TYPE: ClassVar[str] = "line"

    length_m: float
    z0_ohm: float
    velocity_factor: float | None = None
    eps_eff: float | None = None
    loss_db_per_m: float = 0.0
    loss_ref_hz: float | None = None
    conductor_fraction: float = 1.0

    def __post_init__(self):
        object.__setattr__(self, "length_m", _non_negative(self.length_m, "length_m"))
        object.__setattr__(self, "z0_ohm", _positive(self.z0_ohm, "z0_ohm"))
        velocity_factor_of(self.velocity_factor, self.eps_eff)
        for key in ("velocity_factor", "eps_eff"):
            if getattr(self, key) is not None:
                object.__setattr__(self, key, float(getattr(self, key)))
        loss = _non_negative(self.loss_db_per_m, "loss_db_per_m")
        object.__setattr__(self, "loss_db_per_m", loss)
        object.__setattr__(self, "loss_ref_hz",
                           _check_reference(loss, self.loss_ref_hz, loss_key="loss_db_per_m"))
        fraction = _finite(self.conductor_fraction, "conductor_fraction")
        if not 0 <= fraction <= 1:
            raise ConfigError(f"must be in [0, 1], got {fraction:g}", key="conductor_fraction")
        object.__setattr__(self, "conductor_fraction", fraction)

    @property
    def vf(self) -> float:
        """Velocity factor v / c."""
        return velocity_factor_of(self.velocity_factor, self.eps_eff)

    @property
    def delay_s(self) -> float:
        """One-way delay l / (VF c), s."""
        return self.length_m / (self.vf * SPEED_OF_LIGHT_M_PER_S)

    def propagation(self, freq_hz) -> np.ndarray:
        """Propagation constant gamma = alpha + j beta, 1/m, at each frequency."""
        f = np.asarray(freq_hz, dtype=float)
        beta = 2 * np.pi * f / (self.vf * SPEED_OF_LIGHT_M_PER_S)
        if self.loss_db_per_m == 0:
            return 1j * beta
        x = f / self.loss_ref_hz
        shape = self.conductor_fraction * np.sqrt(x) + (1 - self.conductor_fraction) * x
        return self.loss_db_per_m / NEPER_DB * shape + 1j * beta

    def s_parameters(self, freq_hz, z0: float) -> tuple[np.ndarray, np.ndarray]:
        """(S11 = S22, S21 = S12) of the line in a real reference ``z0``.

        From the line's ABCD matrix (cosh, Zc sinh; sinh/Zc, cosh) converted to S
        (Pozar 4th ed. Table 4.2; from memory); checked against scikit-rf media in tests.
        """
        gl = self.propagation(freq_hz) * self.length_m
        zc = self.z0_ohm
        sinh, cosh = np.sinh(gl), np.cosh(gl)
        denominator = (zc ** 2 + z0 ** 2) * sinh + 2 * zc * z0 * cosh
        return (zc ** 2 - z0 ** 2) * sinh / denominator, 2 * zc * z0 / denominator

    def remove(self, freq_hz, s11, z0: float = 50.0) -> np.ndarray:
        """S11 at the line's device end, given S11 at its analyzer end (both at ``z0``)."""
        s_refl, s_thru = self.s_parameters(freq_hz, z0)
        return remove_two_port(np.asarray(s11), s_refl, s_thru ** 2, s_refl)

    def network(self, freq_hz, z0: float = 50.0):
        """The line built with scikit-rf media (``DefinedGammaZ0(...).line``) at ``z0``."""
        import skrf
        from skrf.media import DefinedGammaZ0

        f = np.asarray(freq_hz, dtype=float)
        media = DefinedGammaZ0(skrf.Frequency.from_f(f, unit="Hz"), z0_port=z0,
                               z0=self.z0_ohm, gamma=self.propagation(f))
        return media.line(self.length_m, "m")

    def describe(self) -> dict:
        return {"type": self.TYPE, "length_m": self.length_m, "z0_ohm": self.z0_ohm,
                "velocity_factor": self.velocity_factor, "eps_eff": self.eps_eff,
                "loss_db_per_m": self.loss_db_per_m, "loss_ref_hz": self.loss_ref_hz,
                "conductor_fraction": self.conductor_fraction, "delay_s": self.delay_s}


def _sha256(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


_MATRIX_FORMAT = re.compile(r"^\s*\[matrix format\]\s*(\w+)", re.IGNORECASE | re.MULTILINE)
_TWO_PORT_ORDER = re.compile(r"^\s*\[two-port data order\]\s*(\w+)", re.IGNORECASE | re.MULTILINE)


def _read_two_port(path: Path):
    """Read a 2-port Touchstone fixture with scikit-rf; every failure is one line."""
    import warnings

    import skrf

    where = str(path)
    if not path.is_file():
        raise ConfigError("fixture file not found", where=where)
    text = path.read_text(encoding="utf-8", errors="replace")
    matrix, order = _MATRIX_FORMAT.search(text), _TWO_PORT_ORDER.search(text)
    if matrix and matrix.group(1).lower() != "full" and not (order and order.group(1) == "12_21"):
        # scikit-rf 2.2.0 fills S12/S21 from uninitialised memory here (library-facts.md 1.1)
        raise ConfigError("Touchstone v2 Upper/Lower matrix needs [Two-Port Data Order] 12_21 "
                          "(or write the file with [Matrix Format] Full)", where=where)
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            network = skrf.Network(str(path))
    except Exception as error:  # skrf raises bare ValueError/EOFError/TypeError
        raise ConfigError(f"cannot read the fixture Touchstone file: {error}", where=where) from None
    if network.nports != 2:
        raise ConfigError(f"has {network.nports} port(s); a fixture file must be a 2-port (.s2p)",
                          where=where)
    if network.noisy or network.frequency.npoints < 2 or np.any(np.diff(network.f) <= 0):
        raise ConfigError("frequencies must rise strictly over at least 2 points", where=where)
    if not np.all(np.isfinite(network.s)):
        raise ConfigError("NaN or infinite value in the data", where=where)
    phase_step = np.degrees(np.max(np.abs(np.diff(np.unwrap(np.angle(network.s[:, 1, 0]))))))
    if phase_step > MAX_FIXTURE_PHASE_STEP_DEG:
        raise ConfigError(f"too coarse to interpolate: S21 turns {phase_step:.0f} degrees between "
                          f"points (at most {MAX_FIXTURE_PHASE_STEP_DEG:.0f}); use a finer sweep",
                          where=where)
    return network


@dataclass(frozen=True)
class FixtureFile:
    """A measured or simulated 2-port fixture, port 1 at the analyzer, port 2 at the device.

    path          : the Touchstone ``.s2p`` (or ``.ts``) file; read once, here.
    reverse_ports : True when the file was written with port 1 at the device.

    The fixture is renormalised to the sweep's z0 when its reference differs (skrf
    ``renormalize``, which transforms, unlike assigning ``.z0``), interpolated onto the
    sweep's frequencies (cubic in real/imag, skrf ``interpolate``) and removed with the
    closed form of :func:`remove_two_port`. It must cover the sweep's frequency range.
    """

    TYPE: ClassVar[str] = "file"

    path: str
    reverse_ports: bool = False
    _network: object = field(default=None, init=False, repr=False, compare=False)
    _sha256: str = field(default="", init=False, repr=False, compare=False)
    _renormalised: dict = field(default_factory=dict, init=False, repr=False, compare=False)

    def __post_init__(self):
        path = Path(self.path)
        object.__setattr__(self, "path", str(path))
        if not isinstance(self.reverse_ports, bool):
            raise ConfigError(f"must be true or false, got {self.reverse_ports!r}", key="reverse_ports")
        network = _read_two_port(path)
        if self.reverse_ports:
            network = network.flipped()
        object.__setattr__(self, "_network", network)
        object.__setattr__(self, "_sha256", _sha256(path))

    @property
    def freq_range_hz(self) -> tuple[float, float]:
        return float(self._network.f[0]), float(self._network.f[-1])

    def _at_z0(self, z0: float):
        """The fixture in reference z0 (renormalised once per z0)."""
        if np.allclose(self._network.z0, z0, rtol=0, atol=1e-12):
            return self._network
        if z0 not in self._renormalised:
            network = self._network.copy()
            network.renormalize(z0)
            self._renormalised[z0] = network
        return self._renormalised[z0]

    def s_parameters(self, freq_hz, z0: float = 50.0) -> np.ndarray:
        """The fixture's (N, 2, 2) S-matrix interpolated onto ``freq_hz``, at ``z0``."""
        import skrf

        f = np.asarray(freq_hz, dtype=float)
        lo, hi = self.freq_range_hz
        if f[0] < lo * (1 - _COVER_SLACK) or f[-1] > hi * (1 + _COVER_SLACK):
            raise ConfigError(f"covers {format_si(lo, 'Hz')} to {format_si(hi, 'Hz')} but the sweep "
                              f"runs {format_si(f[0], 'Hz')} to {format_si(f[-1], 'Hz')}; "
                              "the fixture must cover the sweep", where=self.path)
        network = self._at_z0(z0)
        f = np.clip(f, lo, hi)
        kind = "cubic" if network.frequency.npoints >= 4 else "linear"
        return network.interpolate(skrf.Frequency.from_f(f, unit="Hz"), kind=kind, return_array=True)

    def remove(self, freq_hz, s11, z0: float = 50.0) -> np.ndarray:
        s = self.s_parameters(freq_hz, z0)
        return remove_two_port(np.asarray(s11), s[:, 0, 0], s[:, 0, 1] * s[:, 1, 0], s[:, 1, 1])

    def network(self, freq_hz, z0: float = 50.0):
        """The fixture as a skrf 2-port on ``freq_hz`` at ``z0``."""
        import skrf

        f = np.asarray(freq_hz, dtype=float)
        return skrf.Network(frequency=skrf.Frequency.from_f(f, unit="Hz"),
                            s=self.s_parameters(f, z0), z0=z0)

    def describe(self) -> dict:
        lo, hi = self.freq_range_hz
        return {"type": self.TYPE, "path": self.path, "sha256": self._sha256,
                "reverse_ports": self.reverse_ports, "freq_lo_hz": lo, "freq_hi_hz": hi,
                "points": int(self._network.frequency.npoints),
                "file_z0_ohm": [float(z.real) for z in self._network.z0[0]]}


STEP_TYPES = {cls.TYPE: cls for cls in (PortExtension, FixtureLine, FixtureFile)}


# --------------------------------------------------------------------------------------
# the chain


@dataclass(frozen=True)
class FixtureChain:
    """Fixture steps in order from the analyzer port toward the device.

    ``apply`` removes the step nearest the analyzer first, then the next, and records each
    in the sweep's provenance (``Sweep.with_fixture_step``). ``source`` is the file the
    chain came from ("" for command-line flags); ``name`` is shown with every result.
    """

    steps: tuple = ()
    name: str = ""
    source: str = ""

    @property
    def is_empty(self) -> bool:
        return not self.steps

    def apply(self, sweep: Sweep) -> Sweep:
        """The sweep at the device's feed point (unchanged when the chain is empty)."""
        for step in self.steps:
            where = self.source or self.name or "fixture"
            try:
                s11 = step.remove(sweep.freq_hz, sweep.s11, sweep.z0_ohm)
            except MatchbayError as error:
                error.where = error.where or where
                raise
            sweep = sweep.with_fixture_step(s11, self._record(step))
        return sweep

    def apply_many(self, sweeps: list[Sweep]) -> list[Sweep | MatchbayError]:
        """:meth:`apply` for sweeps sharing one frequency grid and z0, every step at once.

        Each step removes its fixture from the stacked reflections (the steps work on
        arrays); each sweep gets the same values and provenance as :meth:`apply` gives it
        alone. Should a step refuse the grid, the sweeps go through :meth:`apply` one by
        one, so each carries its own error. A sweep's error is returned in its place.
        """
        if self.is_empty:
            return list(sweeps)
        freq_hz, z0 = sweeps[0].freq_hz, sweeps[0].z0_ohm
        try:
            s11 = np.stack([sweep.s11 for sweep in sweeps])
            for step in self.steps:
                s11 = step.remove(freq_hz, s11, z0)
        except MatchbayError:
            return [self._apply_or_error(sweep) for sweep in sweeps]
        steps = tuple(self.describe())
        out: list = []
        for sweep, row in zip(sweeps, s11):
            try:
                out.append(sweep.replace(s11=row, provenance=dataclasses.replace(
                    sweep.provenance, fixture=sweep.provenance.fixture + steps)))
            except MatchbayError as error:
                out.append(error)
        return out

    def _apply_or_error(self, sweep: Sweep) -> Sweep | MatchbayError:
        try:
            return self.apply(sweep)
        except MatchbayError as error:
            return error

    def _record(self, step) -> dict:
        return {**step.describe(), "chain": self.name}

    def describe(self) -> list[dict]:
        """One JSON-ready dict per step (with the chain's name), analyzer side first."""
        return [self._record(step) for step in self.steps]

    def summary(self) -> list[str]:
        """One human-readable line per step."""
        return [summarize_step(step.describe()) for step in self.steps]


NO_FIXTURE = FixtureChain(steps=(), name="none", source="")


def summarize_step(step: dict) -> str:
    """One line for a recorded step dict (works on stored provenance too)."""
    kind = step.get("type")
    if kind == PortExtension.TYPE:
        text = f"port extension {format_si(step['delay_s'], 's', 4)}"
        if step.get("loss_ref_hz"):
            text += (f", one-way loss {step['loss_db_dc']:.3g} dB at DC, "
                     f"{step['loss_db_at_ref']:.3g} dB at {format_si(step['loss_ref_hz'], 'Hz')}")
        elif step.get("loss_db_dc"):
            text += f", one-way loss {step['loss_db_dc']:.3g} dB"
        return text
    if kind == FixtureLine.TYPE:
        speed = (f"eps_eff {step['eps_eff']:g}" if step.get("eps_eff") is not None
                 else f"VF {step['velocity_factor']:g}")
        text = (f"line {format_si(step['length_m'], 'm', 4)}, {step['z0_ohm']:g} ohm, {speed} "
                f"({format_si(step['delay_s'], 's', 4)} one way)")
        if step.get("loss_db_per_m"):
            text += (f", {step['loss_db_per_m']:g} dB/m at {format_si(step['loss_ref_hz'], 'Hz')} "
                     f"({100 * step['conductor_fraction']:.0f} % conductor)")
        return text
    if kind == FixtureFile.TYPE:
        flip = ", ports reversed" if step.get("reverse_ports") else ""
        return (f"fixture file {step['path']} ({step['points']} points, "
                f"{format_si(step['freq_lo_hz'], 'Hz')} to {format_si(step['freq_hi_hz'], 'Hz')}, "
                f"sha256 {step['sha256'][:12]}{flip})")
    return str(step)


def passivity_warning(sweep: Sweep, tolerance: float = 0.01) -> str | None:
    """A caution when the de-embedded reflection exceeds 1 (a passive antenna cannot).

    Usually the declared fixture loss is too high, or its delay is wrong. None when fine.
    """
    magnitude = np.abs(sweep.s11)
    i = int(np.argmax(magnitude))
    if magnitude[i] <= 1 + tolerance:
        return None
    return (f"after de-embedding |S11| reaches {magnitude[i]:.3f} at "
            f"{format_si(sweep.freq_hz[i], 'Hz')}: a passive antenna cannot exceed 1; "
            "check the fixture's loss and delay")


# --------------------------------------------------------------------------------------
# chain files (TOML)

CHAIN_KEYS = frozenset({"name", "description", "step"})
STEP_KEYS = {
    PortExtension.TYPE: frozenset({"type", "delay_s", "length_m", "velocity_factor", "eps_eff",
                                   "loss_db_dc", "loss_db_at_ref", "loss_ref_hz"}),
    FixtureLine.TYPE: frozenset({"type", "length_m", "z0_ohm", "velocity_factor", "eps_eff",
                                 "loss_db_per_m", "loss_ref_hz", "conductor_fraction"}),
    FixtureFile.TYPE: frozenset({"type", "path", "reverse_ports"}),
}
# keys describe() records for information only; not written to (nor read from) chain files
_DERIVED = {FixtureLine.TYPE: {"delay_s"},
            FixtureFile.TYPE: {"sha256", "freq_lo_hz", "freq_hi_hz", "points", "file_z0_ohm"}}
_UNIT_OF_KEY = {"delay_s": "s", "length_m": "m", "loss_ref_hz": "Hz", "z0_ohm": "ohm"}


def parse_with_unit(text: str, unit: str, *, what: str) -> float:
    """``'40 mm'``, ``'85 ps'``, ``'2.4 GHz'``: a quantity whose unit must be written.

    Requiring the unit keeps ``'40m'`` (metres? milli?) from being misread.
    """
    body = str(text).strip()
    if not body.lower().endswith(unit.lower()):
        raise ConfigError(f"cannot read {what} {text!r}: write the unit, e.g. '40 mm', '85 ps', "
                          "'2.4 GHz'")
    return parse_quantity(body[: -len(unit)], unit, what=what)


def _value(raw, key: str):
    """A TOML value: numbers are SI; strings for unit keys carry their unit."""
    unit = _UNIT_OF_KEY.get(key)
    if isinstance(raw, str) and unit:
        return parse_with_unit(raw, unit, what=key)
    if isinstance(raw, bool) and key != "reverse_ports":
        raise ConfigError(f"must be a number, got {raw!r}", key=key)
    return raw


def _build_step(table: dict, base_dir: Path):
    kind = table.get("type")
    if kind not in STEP_TYPES:
        raise ConfigError(f"unknown or missing step type {kind!r} (allowed: {', '.join(STEP_TYPES)})",
                          key="type")
    check_keys(table, STEP_KEYS[kind], where=None)
    values = {k: _value(v, k) for k, v in table.items() if k != "type"}
    if kind == PortExtension.TYPE and "delay_s" not in values:
        if "length_m" not in values:
            raise ConfigError("give delay_s, or length_m with velocity_factor or eps_eff", key="delay_s")
        return PortExtension.from_length(values.pop("length_m"), **values)
    if kind == PortExtension.TYPE and ({"length_m", "velocity_factor", "eps_eff"} & values.keys()):
        raise ConfigError("give either delay_s or length_m with a velocity factor, not both",
                          key="delay_s")
    if kind == FixtureFile.TYPE:
        if "path" not in values:
            raise ConfigError("a file step needs a path", key="path")
        values["path"] = str(base_dir / Path(str(values["path"])).expanduser())
    required = {f.name for f in fields(STEP_TYPES[kind])
                if f.init and f.default is MISSING and f.default_factory is MISSING}
    missing = sorted(required - values.keys())
    if missing:
        raise ConfigError(f"missing required key for a {kind} step", key=missing[0])
    return STEP_TYPES[kind](**values)


def _line_of(text: str, key: str, step_index: int | None) -> int | None:
    """1-based line of ``key =`` at top level (step_index None) or in the n-th [[step]]."""
    pattern = re.compile(rf"^\s*{re.escape(key)}\s*=")
    block = -1
    for number, line in enumerate(text.splitlines(), start=1):
        if re.match(r"^\s*\[\[\s*step\s*\]\]", line):
            block += 1
        elif re.match(r"^\s*\[", line) and step_index is None:
            return None
        elif pattern.match(line) and (block == step_index if step_index is not None else block < 0):
            return number
    return None


def load_chain(name_or_path: str | Path) -> FixtureChain:
    """A chain from ``configs/fixtures/NAME.toml`` or a TOML file path.

    File format: optional ``name`` and ``description``, then one ``[[step]]`` table per
    step, analyzer side first, with ``type = "port_extension" | "line" | "file"`` and the
    step's keys (numbers in SI units; a string with its unit also works: ``"40 mm"``).
    A ``file`` step's relative ``path`` is relative to the chain file. Unknown keys and
    wrong values are refused naming the file, the line and the key.
    """
    path = resolve(name_or_path, "fixtures")
    where = str(path)
    table = load_toml(path)
    text = path.read_text(encoding="utf-8")
    try:
        check_keys(table, CHAIN_KEYS, where=where)
    except ConfigError as error:
        error.line = _line_of(text, error.key, None)
        raise
    tables = table.get("step", [])
    if not isinstance(tables, list) or not all(isinstance(t, dict) for t in tables):
        raise ConfigError("steps must be [[step]] tables", where=where, key="step")
    if not tables:
        raise ConfigError("no [[step]] tables: a fixture chain needs at least one step", where=where)
    steps = []
    for index, step_table in enumerate(tables):
        try:
            steps.append(_build_step(step_table, path.parent))
        except ConfigError as error:
            if error.where:  # the fixture Touchstone file itself is at fault
                error.message = f"fixture file {error.where}: {error.message}"
                error.key = "path"
            key = error.key or "type"
            error.where, error.line = where, _line_of(text, key, index)
            error.key = f"step[{index + 1}].{key}"
            raise
    name = str(table.get("name") or path.stem)
    return FixtureChain(steps=tuple(steps), name=name, source=where)


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(float(value)) if isinstance(value, float) else str(value)
    return '"' + str(value).replace("\\", "\\\\").replace('"', '\\"') + '"'


def chain_toml(chain: FixtureChain, *, relative_to: Path | None = None,
               comments: tuple[str, ...] = ()) -> str:
    """The TOML text of a chain, readable back by :func:`load_chain`."""
    lines = [f"# {c}" for c in comments]
    lines += [f"name = {_toml_value(chain.name)}", ""]
    for step in chain.steps:
        lines.append("[[step]]")
        record = step.describe()
        for key, value in record.items():
            if value is None or key in _DERIVED.get(record["type"], ()):
                continue
            if key == "path" and relative_to is not None:
                value = os.path.relpath(Path(value).resolve(), relative_to.resolve())
            lines.append(f"{key} = {_toml_value(value)}")
        lines.append("")
    return "\n".join(lines)


def write_chain_toml(path: str | Path, chain: FixtureChain, *, comments: tuple[str, ...] = ()) -> Path:
    """Write the chain to ``path`` atomically (temporary file, then rename); returns the path."""
    path = Path(path)
    if chain.is_empty:
        raise ConfigError("nothing to write: the chain has no steps", where=str(path))
    text = chain_toml(chain, relative_to=path.parent, comments=comments)
    path.parent.mkdir(parents=True, exist_ok=True)
    handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".part")
    try:
        with os.fdopen(handle, "w", encoding="utf-8") as out:
            out.write(text)
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise
    return path


# --------------------------------------------------------------------------------------
# simple cases from command-line options

_FLAG_OF_KEY = {"delay_s": "--port-delay", "length_m": "--port-length",
                "velocity_factor": "--velocity-factor", "eps_eff": "--eps-eff",
                "loss_db_at_ref": "--port-loss", "loss_db_dc": "--port-loss-dc",
                "loss_ref_hz": "--loss-ref"}


def chain_from_options(delay: float | None = None, length: float | None = None,
                       velocity_factor: float | None = None, eps_eff: float | None = None,
                       loss_db: float = 0.0, loss_db_dc: float = 0.0,
                       loss_ref_hz: float | None = None) -> FixtureChain:
    """A one-step port-extension chain from SI values, or NO_FIXTURE when none is given.

    delay  : one-way delay, s; or ``length`` (m) with ``velocity_factor`` or ``eps_eff``.
    loss_db: one-way loss at ``loss_ref_hz``; ``loss_db_dc`` at 0 Hz (sqrt(f) in between;
             ``loss_db_dc`` alone is a flat loss).
    """
    if delay is None and length is None:
        if velocity_factor is not None or eps_eff is not None or loss_db or loss_db_dc:
            raise ConfigError("a port extension needs a delay or a length", key="delay_s")
        return NO_FIXTURE
    if delay is not None and length is not None:
        raise ConfigError("give a delay or a length, not both", key="delay_s")
    loss = {"loss_db_dc": loss_db_dc, "loss_db_at_ref": loss_db, "loss_ref_hz": loss_ref_hz}
    if delay is not None:
        if velocity_factor is not None or eps_eff is not None:
            raise ConfigError("a velocity factor goes with a length, not a delay",
                              key="velocity_factor")
        step = PortExtension(delay, **loss)
    else:
        step = PortExtension.from_length(length, velocity_factor=velocity_factor,
                                         eps_eff=eps_eff, **loss)
    return FixtureChain(steps=(step,), name="port extension (command line)", source="")


def chain_for_cli(fixture: str | None = None, port_delay: str | None = None, *,
                  port_length: str | None = None, velocity_factor: str | float | None = None,
                  eps_eff: str | float | None = None, port_loss: str | float | None = None,
                  port_loss_dc: str | float | None = None,
                  loss_ref: str | None = None) -> FixtureChain:
    """The chain for a command's fixture flags, as typed; errors name the flag.

    ``--fixture NAME|FILE`` loads a chain file and excludes the ``--port-*`` flags.
    ``--port-delay 85p`` (one-way), or ``--port-length 40mm`` with ``--velocity-factor``
    or ``--eps-eff``; ``--port-loss DB`` (one-way, at ``--loss-ref F``) and
    ``--port-loss-dc DB`` (one-way at 0 Hz; alone, a flat loss).
    """
    port_flags = (port_delay, port_length, velocity_factor, eps_eff, port_loss, port_loss_dc,
                  loss_ref)
    if fixture:
        if any(v is not None for v in port_flags):
            raise ConfigError("give either --fixture or the --port-* flags, not both",
                              where="--fixture")
        return load_chain(fixture)
    try:
        return chain_from_options(
            delay=None if port_delay is None else parse_quantity(port_delay, "s", what="delay"),
            length=None if port_length is None else parse_with_unit(port_length, "m", what="length"),
            velocity_factor=None if velocity_factor is None else _finite(velocity_factor, "velocity_factor"),
            eps_eff=None if eps_eff is None else _finite(eps_eff, "eps_eff"),
            loss_db=0.0 if port_loss is None else _finite(port_loss, "loss_db_at_ref"),
            loss_db_dc=0.0 if port_loss_dc is None else _finite(port_loss_dc, "loss_db_dc"),
            loss_ref_hz=None if loss_ref is None else parse_frequency(loss_ref))
    except ConfigError as error:
        if error.key in _FLAG_OF_KEY:
            error.where, error.key = _FLAG_OF_KEY[error.key], None
        raise
