"""Options shared by the commands that process sweeps (match, lot, watch, measure).

:func:`build_settings` turns command-line strings (and an optional station file under
``configs/stations/``) into a :class:`pipeline.process.Settings`. Precedence: a flag given
on the command line, then the station file, then ``configs/default.toml``.
"""

from __future__ import annotations

import functools
import inspect
import typing
from dataclasses import dataclass
from typing import Optional

import typer

from pipeline.config import check_keys, load_defaults, load_toml, resolve
from pipeline.errors import ConfigError
from pipeline.units import parse_band

STATION_KEYS = frozenset({
    "band", "z0", "spec_rl", "series", "parts", "fixture", "port", "max_mb", "lot",
    "watch",
})


@dataclass(frozen=True)
class FixtureFlags:
    """The fixture flags as typed (strings); see :func:`pipeline.deembed.chain_for_cli`."""

    fixture: Optional[str] = None
    port_delay: Optional[str] = None
    port_length: Optional[str] = None
    velocity_factor: Optional[str] = None
    eps_eff: Optional[str] = None
    port_loss: Optional[str] = None
    port_loss_dc: Optional[str] = None
    loss_ref: Optional[str] = None

    def chain(self, station_fixture: str | None = None):
        """The fixture chain these flags describe (a station's fixture when none is given)."""
        from pipeline.deembed import chain_for_cli

        flags = {k: v for k, v in self.__dict__.items() if k != "fixture"}
        fixture = self.fixture
        if fixture is None and all(v is None for v in flags.values()):
            fixture = station_fixture
        return chain_for_cli(fixture, **flags)


_FIXTURE_OPTIONS = {
    "fixture": typer.Option(None, "--fixture", help="Fixture chain: a name under configs/fixtures/ or a TOML file."),
    "port_delay": typer.Option(None, "--port-delay", help="Port extension: one-way delay, e.g. 85p."),
    "port_length": typer.Option(None, "--port-length", help="Port extension as a length, e.g. 40mm (with --velocity-factor or --eps-eff)."),
    "velocity_factor": typer.Option(None, "--velocity-factor", help="Velocity factor of the --port-length line, 0 < v <= 1."),
    "eps_eff": typer.Option(None, "--eps-eff", help="Effective permittivity of the --port-length line."),
    "port_loss": typer.Option(None, "--port-loss", help="One-way fixture loss in dB at --loss-ref (grows with sqrt f)."),
    "port_loss_dc": typer.Option(None, "--port-loss-dc", help="One-way fixture loss in dB at 0 Hz."),
    "loss_ref": typer.Option(None, "--loss-ref", help="Frequency at which --port-loss is given, e.g. 2.4G."),
}


def with_fixture_flags(command):
    """Give a typer command the fixture options; it receives them as ``fixture_flags``.

    The command declares a parameter ``fixture_flags: FixtureFlags``; typer sees the
    eight ``--fixture`` / ``--port-*`` options in its place (one definition for every
    command that de-embeds).
    """
    hints = typing.get_type_hints(command)       # resolved in the command's own module
    signature = inspect.signature(command)
    kept = [p.replace(kind=inspect.Parameter.KEYWORD_ONLY, annotation=hints[name])
            for name, p in signature.parameters.items() if name != "fixture_flags"]
    added = [inspect.Parameter(name, inspect.Parameter.KEYWORD_ONLY, default=option,
                               annotation=Optional[str])
             for name, option in _FIXTURE_OPTIONS.items()]

    @functools.wraps(command)
    def wrapper(*args, **kwargs):
        flags = FixtureFlags(**{name: kwargs.pop(name) for name in _FIXTURE_OPTIONS})
        return command(*args, fixture_flags=flags, **kwargs)

    wrapper.__signature__ = signature.replace(parameters=kept + added)
    wrapper.__annotations__ = {p.name: p.annotation for p in kept + added}
    del wrapper.__wrapped__              # typer must read the new signature, not the original
    return wrapper


def load_station(name_or_path: str | None) -> dict:
    """A station file (TOML) of default options, or {} when none is given."""
    if not name_or_path:
        return {}
    path = resolve(name_or_path, "stations")
    table = load_toml(path)
    check_keys(table, STATION_KEYS, where=str(path))
    table["_path"] = str(path)
    return table


def _pick(flag, station: dict, key: str, default):
    if flag is not None:
        return flag
    return station.get(key, default)


def build_settings(*, band: str | None, z0: float | None = None, spec_rl: float | None = None,
                   series: str | None = None, parts: str | None = None,
                   fixture: FixtureFlags | None = None,
                   port: int | None = None, max_mb: float | None = None, lot: str | None = None,
                   station: dict | None = None):
    """Settings for band matching from CLI values; a missing band is a one-line error."""
    from pipeline.parts import load_parts
    from pipeline.process import Settings

    station = station or {}
    defaults = load_defaults()
    band_text = _pick(band, station, "band", None)
    if not band_text:
        raise ConfigError("a band is required (--band F1:F2, e.g. 902M:928M)", where="--band")
    return Settings(
        band_hz=parse_band(band_text),
        z0_ohm=float(_pick(z0, station, "z0", defaults["z0_ohm"])),
        spec_rl_db=float(_pick(spec_rl, station, "spec_rl", defaults["spec_rl_db"])),
        series=str(_pick(series, station, "series", defaults["series_band"])),
        parts=load_parts(_pick(parts, station, "parts", defaults["parts"])),
        fixture=(fixture or FixtureFlags()).chain(station.get("fixture")),
        port=int(_pick(port, station, "port", 1)),
        max_bytes=int(float(_pick(max_mb, station, "max_mb", defaults["max_file_mb"])) * 1024 ** 2),
        lot=str(_pick(lot, station, "lot", "")),
    )
