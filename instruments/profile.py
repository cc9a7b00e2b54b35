"""Analyzer profiles: the SCPI dialect of one analyzer family, read from a TOML file.

A profile under ``configs/analyzers/`` holds every command matchbay sends, as a template
with named placeholders (``":SENS1:FREQ:STAR {start_hz}"``), plus the few facts about the
conversation that differ between analyzers: termination characters, whether commands may
be joined with ``;`` into one write, whether the analyzer reports its frequency list or
the list is derived from start/stop/points, which data formats and byte orders it offers,
and timeouts. Supporting another analyzer means writing another profile file, never code.

The layout is described, key by key, in DEVELOPERS.md ("How to add an analyzer profile")
and in the shipped ``configs/analyzers/generic-scpi.toml``.
"""

from __future__ import annotations

import hashlib
import string
from dataclasses import dataclass
from pathlib import Path
from types import MappingProxyType
from typing import Mapping

from pipeline.config import check_keys, load_toml, resolve
from pipeline.errors import ConfigError

#: Data formats matchbay can read, with the struct type code of one value (None: text).
DATA_FORMATS: Mapping[str, str | None] = MappingProxyType({"REAL,64": "d", "REAL,32": "f", "ASCII": None})
#: Byte orders of binary blocks.
BYTE_ORDERS = ("little", "big")
#: How the frequency list is obtained: read from the analyzer, or a linear grid.
FREQUENCY_SOURCES = ("query", "derive")


@dataclass(frozen=True)
class CommandSpec:
    """One command key of a profile: whether it is required, and its placeholders.

    A template must use at least one of its placeholders (a "set points" command that
    does not carry the point count cannot be right) and no other.
    """

    required: bool
    placeholders: frozenset[str] = frozenset()
    joinable: bool = True      # sent as part of a ';'-joined configuration write


def _spec(required: bool, *placeholders: str, joinable: bool = True) -> CommandSpec:
    return CommandSpec(required, frozenset(placeholders), joinable)


#: Every key of the ``[commands]`` table.
COMMANDS: Mapping[str, CommandSpec] = MappingProxyType({
    "identify": _spec(True, joinable=False),          # identity query, e.g. *IDN?
    "reset": _spec(True),                             # preset to factory state (not used by acquire)
    "clear_status": _spec(True),                      # clear the error queue and status, e.g. *CLS
    "single_sweep_mode": _spec(False),                # stop continuous sweeping so a trigger gives one sweep
    "set_start": _spec(True, "start_hz"),
    "set_stop": _spec(True, "stop_hz"),
    "set_points": _spec(True, "points"),
    "set_ifbw": _spec(True, "ifbw_hz"),
    "select_parameter": _spec(True, "parameter", "port"),   # parameter is "S11" or "S22", port 1 or 2
    "trigger": _spec(True),                           # start one sweep
    "wait": _spec(True, joinable=False),              # query answering "1" once the sweep is complete
    "read_trace": _spec(True, joinable=False),        # complex trace: re, im interleaved
    "read_frequencies": _spec(False, joinable=False),  # required when [sweep] frequencies = "query"
    "read_error": _spec(True, joinable=False),        # next error queue entry: <code>,"<text>"
    "sweep_time": _spec(False, joinable=False),       # query of the expected sweep time, s
})

_SAMPLE_VALUES = {"start_hz": 1.0e9, "stop_hz": 2.0e9, "points": 1601, "ifbw_hz": 1.0e3,
                  "parameter": "S11", "port": 1}

_TOP_KEYS = frozenset({"description", "connection", "sweep", "commands", "data_formats", "byte_orders"})
_CONNECTION_KEYS = frozenset({"read_termination", "write_termination", "io_timeout_s", "join_commands",
                              "block_terminated"})
_SWEEP_KEYS = frozenset({"frequencies", "sweep_time_factor", "z0_ohm"})


@dataclass(frozen=True)
class Profile:
    """A validated analyzer profile.

    commands       : command key -> template (only the keys the file gives).
    data_formats   : "REAL,64" | "REAL,32" | "ASCII" -> command selecting it.
    byte_orders    : "little" | "big" -> command selecting it ("" when the order is fixed).
    join_commands  : several commands of one step go out as one ``;``-joined write.
    block_terminated : a binary block is followed by the read termination character.
    frequencies    : "query" (read the list) or "derive" (linear grid from start/stop/points).
    io_timeout_s   : timeout for one ordinary reply, s.
    sweep_time_factor : the wait for a sweep may last factor x expected sweep time + io timeout.
    z0_ohm         : the analyzer's reference impedance, ohm.
    """

    name: str
    path: Path
    sha256: str
    description: str
    commands: Mapping[str, str]
    data_formats: Mapping[str, str]
    byte_orders: Mapping[str, str]
    read_termination: str = "\n"
    write_termination: str = "\n"
    io_timeout_s: float = 5.0
    join_commands: bool = False
    block_terminated: bool = True
    frequencies: str = "query"
    sweep_time_factor: float = 2.0
    z0_ohm: float = 50.0

    def has(self, key: str) -> bool:
        """Whether the profile gives the (optional) command ``key``."""
        return key in self.commands

    def command(self, key: str, **values) -> str:
        """The command ``key`` with its placeholders filled in."""
        return self.commands[key].format(**values)

    def check_supports(self, data_format: str, byte_order: str) -> None:
        """Refuse a data format or byte order this analyzer does not offer (ConfigError)."""
        if data_format not in self.data_formats:
            raise ConfigError(f"data format {data_format!r} is not offered by this analyzer "
                              f"(offered: {', '.join(self.data_formats)})", where=str(self.path))
        if DATA_FORMATS[data_format] is not None and byte_order not in self.byte_orders:
            raise ConfigError(f"byte order {byte_order!r} is not offered by this analyzer "
                              f"(offered: {', '.join(self.byte_orders) or 'none'})", where=str(self.path))


def load_profile(name_or_path: str | Path) -> Profile:
    """Read and validate a profile: a path, or a name under ``configs/analyzers/``.

    Every mistake is a :class:`ConfigError` naming the file and the key.
    """
    path = resolve(name_or_path, "analyzers")
    table = load_toml(path)
    where = str(path)
    check_keys(table, _TOP_KEYS, where=where)
    connection = _section(table, "connection", _CONNECTION_KEYS, where)
    sweep = _section(table, "sweep", _SWEEP_KEYS, where)
    join = _typed(connection, "join_commands", bool, False, where, "connection")
    commands = _commands(table, where, join)
    frequencies = _typed(sweep, "frequencies", str, "query", where, "sweep")
    if frequencies not in FREQUENCY_SOURCES:
        raise ConfigError(f"must be one of {', '.join(FREQUENCY_SOURCES)}", where=where, key="sweep.frequencies")
    if frequencies == "query" and "read_frequencies" not in commands:
        raise ConfigError("missing key (needed because sweep.frequencies is \"query\")", where=where,
                          key="commands.read_frequencies")
    data_formats = _choices(table, "data_formats", DATA_FORMATS, where, join)
    needs_order = any(DATA_FORMATS[f] is not None for f in data_formats)
    byte_orders = _choices(table, "byte_orders", BYTE_ORDERS, where, join, required=needs_order)
    return Profile(
        name=path.stem,
        path=path,
        sha256=hashlib.sha256(path.read_bytes()).hexdigest(),
        description=_typed(table, "description", str, "", where, ""),
        commands=MappingProxyType(commands),
        data_formats=MappingProxyType(data_formats),
        byte_orders=MappingProxyType(byte_orders),
        read_termination=_termination(connection, "read_termination", where),
        write_termination=_termination(connection, "write_termination", where),
        io_timeout_s=_positive(connection, "io_timeout_s", 5.0, where, "connection"),
        join_commands=join,
        block_terminated=_typed(connection, "block_terminated", bool, True, where, "connection"),
        frequencies=frequencies,
        sweep_time_factor=_positive(sweep, "sweep_time_factor", 2.0, where, "sweep"),
        z0_ohm=_positive(sweep, "z0_ohm", 50.0, where, "sweep"),
    )


def _section(table: dict, name: str, allowed: frozenset[str], where: str) -> dict:
    section = table.get(name, {})
    if not isinstance(section, dict):
        raise ConfigError("must be a table", where=where, key=name)
    check_keys(section, allowed, where=where, section=name)
    return section


def _typed(table: dict, key: str, kind: type, default, where: str, section: str):
    value = table.get(key, default)
    if not isinstance(value, kind):
        raise ConfigError(f"must be a {kind.__name__}, not {value!r}", where=where,
                          key=f"{section}.{key}" if section else key)
    return value


def _positive(table: dict, key: str, default: float, where: str, section: str) -> float:
    value = table.get(key, default)
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not value > 0:
        raise ConfigError(f"must be a positive number, not {value!r}", where=where, key=f"{section}.{key}")
    return float(value)


def _termination(connection: dict, key: str, where: str) -> str:
    value = _typed(connection, key, str, "\n", where, "connection")
    if not value:
        raise ConfigError("must not be empty (a reply could never be told complete)", where=where,
                          key=f"connection.{key}")
    return value


def _commands(table: dict, where: str, join: bool) -> dict[str, str]:
    section = _section(table, "commands", frozenset(COMMANDS), where)
    for key, spec in COMMANDS.items():
        if spec.required and key not in section:
            raise ConfigError("missing key", where=where, key=f"commands.{key}")
    return {key: _template(template, COMMANDS[key], join, where, f"commands.{key}")
            for key, template in section.items()}


def _choices(table: dict, name: str, allowed, where: str, join: bool, required: bool = True) -> dict[str, str]:
    """The ``[data_formats]`` / ``[byte_orders]`` table: choice -> command."""
    if name not in table:
        if required:
            raise ConfigError("missing table", where=where, key=name)
        return {}
    section = _section(table, name, frozenset(allowed), where)
    if required and not section:
        raise ConfigError("must offer at least one choice", where=where, key=name)
    return {key: _template(command, CommandSpec(True), join, where, f"{name}.{key}", allow_empty=True)
            for key, command in section.items()}


def _template(template, spec: CommandSpec, join: bool, where: str, key: str, allow_empty: bool = False) -> str:
    """Check one command template: a string, known placeholders, renders with sample values."""
    if not isinstance(template, str) or not (template.strip() or allow_empty):
        raise ConfigError(f"must be a non-empty string, not {template!r}", where=where, key=key)
    try:
        used = {field for _, field, _, _ in string.Formatter().parse(template) if field is not None}
        unknown = used - spec.placeholders
        if unknown:
            raise ConfigError(f"unknown placeholder {{{sorted(unknown)[0]}}} (allowed: "
                              f"{', '.join('{' + p + '}' for p in sorted(spec.placeholders)) or 'none'})",
                              where=where, key=key)
        if spec.placeholders and not used:
            raise ConfigError(f"must contain one of {', '.join('{' + p + '}' for p in sorted(spec.placeholders))}",
                              where=where, key=key)
        template.format(**_SAMPLE_VALUES)
    except (ValueError, IndexError, KeyError) as error:
        raise ConfigError(f"bad template {template!r}: {error}", where=where, key=key) from None
    if join and spec.joinable and template and template[0] not in ":*":
        # In a ';'-joined SCPI message a header without a leading ':' is taken relative to
        # the previous command's path, which would silently address the wrong node.
        raise ConfigError("must start with ':' or '*' when connection.join_commands is true", where=where, key=key)
    return template
