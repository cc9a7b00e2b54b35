"""TOML configuration: loading with clear errors, finding named files under configs/.

Configuration files live in the repository's ``configs/`` folder (defaults, part
libraries, fixture chains, analyzer profiles). A name such as ``--fixture lead-40mm``
resolves to ``configs/fixtures/lead-40mm.toml``; a path is used as given.
"""

from __future__ import annotations

import re
import sys
from pathlib import Path

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

from pipeline.errors import ConfigError

CONFIG_DIR = Path(__file__).resolve().parent.parent / "configs"


def load_toml(path: str | Path) -> dict:
    """Parse a TOML file; a syntax error names the file and line."""
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError("file not found", where=str(path)) from None
    except (OSError, UnicodeDecodeError) as error:
        raise ConfigError(f"cannot read: {error}", where=str(path)) from None
    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as error:
        # Python < 3.14 gives the position only inside the message: "... (at line 3, column 7)".
        found = re.search(r"\(at line (\d+), column \d+\)$", str(error))
        line = getattr(error, "lineno", None) or (int(found.group(1)) if found else None)
        msg = re.sub(r"\s*\(at line \d+, column \d+\)$", "", str(error))
        raise ConfigError(f"TOML syntax error: {msg}", where=str(path), line=line) from None


def resolve(name_or_path: str | Path, kind: str) -> Path:
    """The file for ``--fixture NAME`` style options: an existing path, else configs/KIND/NAME.toml."""
    p = Path(name_or_path)
    if p.exists():
        return p
    named = CONFIG_DIR / kind / f"{name_or_path}.toml"
    if named.exists():
        return named
    available = sorted(x.stem for x in (CONFIG_DIR / kind).glob("*.toml"))
    raise ConfigError(f"no such file, and no {kind} named so (available: {', '.join(available) or 'none'})",
                      where=str(name_or_path))


def check_keys(table: dict, allowed: set[str] | frozenset[str], *, where: str, section: str = "") -> None:
    """Refuse unknown keys, naming the file and the key (typos must not pass silently)."""
    for key in table:
        if key not in allowed:
            full = f"{section}.{key}" if section else key
            raise ConfigError(f"unknown key (allowed: {', '.join(sorted(allowed))})", where=where, key=full)


def load_defaults() -> dict:
    """configs/default.toml: z0, default band series, spec, part ranges."""
    return load_toml(CONFIG_DIR / "default.toml")
