"""Reading a run's run.toml: parsed with :mod:`tomllib` (data only), then checked key by key.

hopwell writes run.toml once, when a run starts; every command that opens a run directory
reads it through :func:`read_run_config`. A file that is not TOML, a key this hopwell does not
know, a value of the wrong type, or a format newer than this hopwell reads is refused with one
line naming the file, the key and the fix, before anything else is read or written. Keys are
optional here (tables written by tools and tests may hold a subset); the commands that need a
key ask for it with :func:`required`.
"""

from __future__ import annotations

import tomllib
from dataclasses import fields
from pathlib import Path
from typing import get_type_hints

from hopwell.errors import InputError

# The run directory's layout version, written to run.toml as ``format``. Runs written before it
# existed carry none and are format 1 (the same files); a newer format is refused.
FORMAT_VERSION = 2
READABLE_FORMATS = (1, 2)

_FIX = "hopwell writes this file once, when the run starts: restore it from a backup or correct that line"
# Top-level keys and tables, with the type of each value (tables: their own keys below).
TOP_LEVEL = {"format": int, "input": str, "walkers": int, "platform": str, "kind": str,
             "build": dict, "sampler": dict, "budget": dict, "shard": dict}
BUDGET = {"samples": int, "seconds": float}
SHARD = {"index": int, "first_walker": int, "seed": int}


def _type_name(kind) -> str:
    return {int: "an integer", float: "a number", str: "a string", bool: "true or false",
            dict: "a table"}[kind]


def _fits(value, kind) -> bool:
    """Whether a TOML value has the type a setting declares (an integer is a number too)."""
    if kind is float:
        return isinstance(value, (int, float)) and not isinstance(value, bool)
    if kind is int:
        return isinstance(value, int) and not isinstance(value, bool)
    return isinstance(value, kind)


def _declared(cls) -> dict:
    """Field name -> type of a settings dataclass (``X | None`` as ``X``: TOML has no null)."""
    hints = get_type_hints(cls)
    out = {}
    for field in fields(cls):
        kind = hints[field.name]
        out[field.name] = next((a for a in getattr(kind, "__args__", ()) if a is not type(None)), kind)
    return out


def table_schemas() -> dict[str, dict]:
    """The keys and types of each table of run.toml."""
    from hopwell.sampling.settings import SamplerSettings
    from hopwell.systems.builder import BuildOptions

    return {"sampler": _declared(SamplerSettings), "build": _declared(BuildOptions), "budget": BUDGET,
            "shard": SHARD}


def check_run_config(config: dict, path: Path) -> None:
    """Refuse (one line) a run.toml of a newer format, with an unknown key or a mistyped value.

    Parameters
    ----------
    config : dict
        The parsed file.
    path : Path
        The file, for the message.

    Raises
    ------
    InputError
    """
    version = config.get("format", 1)
    if not _fits(version, int) or version not in READABLE_FORMATS:
        raise InputError(f"{path}: run directory format {version!r}; this hopwell reads formats"
                         f" {READABLE_FORMATS[0]}-{READABLE_FORMATS[-1]}: use the hopwell that wrote it"
                         " (or a newer one)")
    schemas = table_schemas()
    for key, value in config.items():
        if key not in TOP_LEVEL:
            raise InputError(f"{path}: unknown key {key!r}; {_FIX}")
        _check_value(key, value, TOP_LEVEL[key], path)
        if key in schemas:
            for inner, item in value.items():
                if inner not in schemas[key]:
                    raise InputError(f"{path}: unknown key '{key}.{inner}'; {_FIX}")
                _check_value(f"{key}.{inner}", item, schemas[key][inner], path)
    if "walkers" in config and config["walkers"] < 1:
        raise InputError(f"{path}: walkers must be at least 1, not {config['walkers']}; {_FIX}")


def _check_value(key: str, value, kind, path: Path) -> None:
    if not _fits(value, kind):
        raise InputError(f"{path}: {key} must be {_type_name(kind)}, not {value!r}; {_FIX}")


def read_run_config(path: Path) -> dict:
    """Parse and check a run.toml (see :func:`check_run_config`).

    Raises
    ------
    InputError
        The file is missing, is not UTF-8 TOML, or fails the checks.
    """
    try:
        config = tomllib.loads(Path(path).read_text())
    except FileNotFoundError:
        raise InputError(f"{Path(path).parent} is not a hopwell run directory (no {Path(path).name})") from None
    except (UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        raise InputError(f"{path}: not valid TOML ({exc}); {_FIX}") from None
    check_run_config(config, path)
    return config


def required(config: dict, key: str, path: Path):
    """``config[key]``, or a one-line InputError naming the missing key."""
    if key not in config:
        raise InputError(f"{path}: no {key!r}; {_FIX}")
    return config[key]
