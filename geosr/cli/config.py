"""TOML configuration files: option values for the command line.

A config file holds the same settings as the command line, each key named
exactly as the long option without its dashes (``chunk``, ``workers``,
``method``, ``self-train``, ``co``). Top-level keys apply to whichever
command reads the file; a table named after a command (``[train]``,
``[magnify]``, ``[assess]``) holds keys for that command only and wins over
the top level. A key that the command does not have, or a value of the wrong
TOML type, is an error that names the file and the key. Options given on the
command line win over the file. Relative paths in the file are taken from the
current directory, exactly as if they were typed on the command line.

Example (``configs/drone-x4.toml``)::

    scale = 4
    bands = [1, 2, 3, 4]

    [magnify]
    method = "anchored"
    chunk = 512
    co = { COMPRESS = "ZSTD", PREDICTOR = 2 }

This module knows nothing of click; the command line describes its options
to it as a schema of :class:`Key` entries.
"""

from __future__ import annotations

import difflib
import math
import sys
from typing import NamedTuple

from ..errors import ParameterError

__all__ = ["Key", "KINDS", "read_toml", "check_value", "load_config"]


class Key(NamedTuple):
    """One config key of a command.

    Attributes
    ----------
    param : str
        The name the command uses for it (``"self_train"`` for ``self-train``).
    kind : str
        One of :data:`KINDS`.
    choices : tuple of str or None
        The allowed strings for the ``"choice"`` kind.
    """

    param: str
    kind: str
    choices: tuple | None = None


#: The value kinds a key can have, and the TOML values each accepts.
KINDS = {
    "int": "an integer",
    "number": "a number",
    "str": "a string",
    "bool": "a boolean (true or false)",
    "choice": "a string",
    "bands": "an array of band numbers, e.g. [1, 2, 3], or a string '1,2,3'",
    "key-value": "a table of creation options, e.g. { COMPRESS = \"ZSTD\" }, "
    "or an array of 'KEY=VALUE' strings",
    "size": "a size such as \"500G\" or a whole number of bytes",
    "list-of-str": "an array of strings",
    "list-of-int": "an array of integers",
    "list-of-number": "an array of numbers",
}


def _toml_type(value):
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, int):
        return "an integer"
    if isinstance(value, float):
        return "a float"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, list):
        return "an array"
    if isinstance(value, dict):
        return "a table"
    return f"a {type(value).__name__}"


def read_toml(path):
    """Parse a TOML file into a dict.

    Raises
    ------
    ParameterError
        The file is missing, unreadable, not UTF-8 or not valid TOML; the
        message names the file (and TOML's own line and column).
    """
    # imported here: only a run with --config pays for the TOML parser
    if sys.version_info >= (3, 11):
        import tomllib
    else:  # pragma: no cover - exercised on Python 3.10 only
        import tomli as tomllib

    try:
        with open(path, "rb") as f:
            return tomllib.load(f)
    except FileNotFoundError:
        raise ParameterError(f"The config file {str(path)!r} does not exist") from None
    except IsADirectoryError:
        raise ParameterError(
            f"The config file must be a TOML file, got the directory {str(path)!r}"
        ) from None
    except PermissionError:
        raise ParameterError(f"The config file {str(path)!r} cannot be read (permission denied)") from None
    except UnicodeDecodeError:
        raise ParameterError(f"The config file {str(path)!r} must be UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        raise ParameterError(f"The config file {str(path)!r} is not valid TOML: {exc}") from None


def _wrong(path, key, spec, value):
    return ParameterError(
        f"The key {key!r} in the config file {str(path)!r} must be {KINDS[spec.kind]}, "
        f"got {value!r} ({_toml_type(value)})"
    )


def _scalar(kind, value):
    """Return (ok, value) for one scalar of the given kind."""
    if kind == "int":
        return isinstance(value, int) and not isinstance(value, bool), value
    if kind == "number":
        ok = isinstance(value, (int, float)) and not isinstance(value, bool)
        return ok and math.isfinite(value), value
    if kind in ("str", "choice"):
        return isinstance(value, str), value
    if kind == "bool":
        return isinstance(value, bool), value
    raise ValueError(f"unknown config kind {kind!r}")  # a programming error


def check_value(key, value, spec, path="<config>"):
    """Check one value against its :class:`Key` and normalise it.

    Returns the value in the form the command line would have produced:
    ``"key-value"`` tables become a list of ``"KEY=VALUE"`` strings (booleans
    as ``YES``/``NO``), other kinds are returned as they are.

    Raises
    ------
    ParameterError
        The value has the wrong TOML type, or a choice is not allowed; the
        message names the file, the key, what is allowed and what was found.
    """
    kind = spec.kind
    if kind == "bands":
        if isinstance(value, str):
            return value
        if isinstance(value, list) and value and all(
            isinstance(v, int) and not isinstance(v, bool) for v in value
        ):
            return list(value)
        raise _wrong(path, key, spec, value)
    if kind == "size":
        if isinstance(value, str) or (isinstance(value, int) and not isinstance(value, bool)):
            return value
        raise _wrong(path, key, spec, value)
    if kind == "key-value":
        if isinstance(value, dict):
            items = []
            for name, val in value.items():
                if isinstance(val, bool):
                    val = "YES" if val else "NO"
                elif isinstance(val, (int, float, str)):
                    val = str(val)
                else:
                    raise ParameterError(
                        f"The creation option {name!r} of the key {key!r} in the config file "
                        f"{str(path)!r} must be a string, number or boolean, got {val!r} "
                        f"({_toml_type(val)})"
                    )
                items.append(f"{name}={val}")
            return items
        if isinstance(value, list) and all(isinstance(v, str) for v in value):
            return list(value)
        if isinstance(value, str):
            return [value]
        raise _wrong(path, key, spec, value)
    if kind.startswith("list-of-"):
        inner = kind[len("list-of-"):]
        if not isinstance(value, list) or not all(_scalar(inner, v)[0] for v in value):
            raise _wrong(path, key, spec, value)
        return list(value)
    ok, value = _scalar(kind, value)
    if not ok:
        raise _wrong(path, key, spec, value)
    if kind == "choice" and spec.choices is not None:
        allowed = {c.lower(): c for c in spec.choices}
        if value.lower() not in allowed:
            raise ParameterError(
                f"The key {key!r} in the config file {str(path)!r} must be one of "
                f"{', '.join(repr(c) for c in spec.choices)}, got {value!r}"
            )
        return allowed[value.lower()]
    return value


def _unknown(path, key, schema, command, where=""):
    allowed = sorted(schema)
    close = difflib.get_close_matches(key, allowed, n=1)
    hint = f" (did you mean {close[0]!r}?)" if close else ""
    who = f"'geosr {command}'" if command else "this command"
    return ParameterError(
        f"The config file {str(path)!r} has an unknown key {key!r}{where}{hint}; "
        f"{who} takes: {', '.join(allowed)}"
    )


def load_config(path, schema, *, command=None, sections=()):
    """Read a config file and return the values for one command.

    Parameters
    ----------
    path : str or os.PathLike
        The TOML file.
    schema : dict
        ``{key: Key}``: the keys the command takes, named as its long
        options without dashes.
    command : str, optional
        The command reading the file; its table (``[command]``) is merged
        over the top-level keys.
    sections : sequence of str
        Names of all commands that may have a table. Tables of the other
        commands are skipped (they are checked when those commands read the
        file); any other table is an unknown key.

    Returns
    -------
    dict
        ``{key: value}`` for the keys present, values normalised by
        :func:`check_value`.

    Raises
    ------
    ParameterError
        Unknown key, wrong type, or an unreadable file (exit code 2).
    """
    data = read_toml(path)
    values = {}
    own = None
    for key, value in data.items():
        if key in schema:
            values[key] = check_value(key, value, schema[key], path)
        elif key in sections and isinstance(value, dict):
            if key == command:
                own = value
        else:
            raise _unknown(path, key, schema, command)
    if own is not None:
        for key, value in own.items():
            if key not in schema:
                raise _unknown(path, key, schema, command, where=f" in the table [{command}]")
            values[key] = check_value(key, value, schema[key], path)
    return values
