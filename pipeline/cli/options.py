"""Options shared by the commands that process sweeps (match, lot, watch, measure).

:func:`build_settings` turns command-line strings (and an optional station file under
``configs/stations/``) into a :class:`pipeline.process.Settings`. Precedence: a flag given
on the command line, then the station file, then ``configs/default.toml``.
"""

from __future__ import annotations

from pipeline.config import check_keys, load_defaults, load_toml, resolve
from pipeline.errors import ConfigError
from pipeline.units import parse_band

STATION_KEYS = frozenset({
    "band", "z0", "spec_rl", "series", "parts", "fixture", "port", "max_mb", "lot",
    "watch",
})


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
                   fixture: str | None = None, port_delay: str | None = None,
                   port: int | None = None, max_mb: float | None = None, lot: str | None = None,
                   station: dict | None = None):
    """Settings for band matching from CLI values; a missing band is a one-line error."""
    from pipeline.deembed import chain_for_cli
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
        fixture=chain_for_cli(_pick(fixture, station, "fixture", None), port_delay),
        port=int(_pick(port, station, "port", 1)),
        max_bytes=int(float(_pick(max_mb, station, "max_mb", defaults["max_file_mb"])) * 1024 ** 2),
        lot=str(_pick(lot, station, "lot", "")),
    )
