"""Reading TOML files with validation that names the file, the key path and the
problem (``band[2].stop_hz: must be a number, got 'abc'``).

`Table` wraps one TOML table and hands out typed values; every accessor raises
`harness.errors.ConfigError` instead of letting a KeyError or TypeError escape.
Written by hand because the messages (key paths, nearest-key suggestions) are part
of the product's contract and a schema library would word them its own way.
"""

from __future__ import annotations

import difflib
import hashlib
import math
import tomllib
from pathlib import Path
from typing import Any, Iterable

from harness.errors import ConfigError

_MISSING = object()


def load_toml(path: str | Path) -> tuple[dict, bytes]:
    """Read and parse a TOML file. Returns ``(data, raw_bytes)``.

    Raises ConfigError naming the file for a missing file, unreadable bytes or a
    TOML syntax error (with tomllib's line and column).
    """
    p = Path(path)
    try:
        raw = p.read_bytes()
    except FileNotFoundError:
        raise ConfigError(str(p), None, "file not found") from None
    except IsADirectoryError:
        raise ConfigError(str(p), None, "is a directory, expected a TOML file") from None
    except OSError as exc:
        raise ConfigError(str(p), None, f"cannot read file ({exc.strerror})") from None
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ConfigError(str(p), None, f"not UTF-8 text (byte {exc.start})") from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(str(p), None, f"TOML syntax error: {exc}") from None
    except ValueError as exc:  # tomllib lets int() errors escape (over 4300 digits)
        raise ConfigError(str(p), None, f"TOML value not readable: {exc}") from None
    except RecursionError:  # tomllib recurses on nested arrays / inline tables
        raise ConfigError(str(p), None, "TOML syntax error: arrays or tables nested too deeply") from None
    return data, raw


def sha256_hex(raw: bytes) -> str:
    return hashlib.sha256(raw).hexdigest()


def _type_name(value: Any) -> str:
    if isinstance(value, bool):
        return "a boolean"
    if isinstance(value, int):
        return "an integer"
    if isinstance(value, float):
        return "a number"
    if isinstance(value, str):
        return "a string"
    if isinstance(value, list):
        return "an array"
    if isinstance(value, dict):
        return "a table"
    return type(value).__name__


def _show(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 60 else text[:57] + "..."


class Table:
    """One TOML table with its file and key path, handing out validated values."""

    def __init__(self, data: Any, file: str | None, path: str = ""):
        self.file = file
        self.path = path
        if not isinstance(data, dict):
            raise ConfigError(file, path or None, f"must be a table, got {_type_name(data)}")
        self.data = data

    # -- key paths --------------------------------------------------------------
    def key(self, name: str) -> str:
        return f"{self.path}.{name}" if self.path else name

    def error(self, name: str | None, problem: str) -> ConfigError:
        return ConfigError(self.file, self.key(name) if name else (self.path or None), problem)

    def has(self, name: str) -> bool:
        return name in self.data

    def check_known(self, allowed: Iterable[str]) -> None:
        """Reject keys that are not in `allowed`, suggesting the nearest known key."""
        allowed = list(allowed)
        for name in self.data:
            if name not in allowed:
                near = difflib.get_close_matches(name, allowed, n=1, cutoff=0.6)
                hint = f"; did you mean '{near[0]}'?" if near else f"; known keys: {', '.join(sorted(allowed))}"
                raise self.error(name, f"unknown key{hint}")

    def _get(self, name: str, default: Any) -> Any:
        if name in self.data:
            return self.data[name]
        if default is _MISSING:
            raise self.error(name, "missing key")
        return default

    # -- scalars ----------------------------------------------------------------
    def str(self, name: str, default: Any = _MISSING, choices: Iterable[str] | None = None) -> Any:
        value = self._get(name, default)
        if value is default and name not in self.data:
            return value
        if not isinstance(value, str):
            raise self.error(name, f"must be a string, got {_type_name(value)} {_show(value)}")
        if choices is not None:
            choices = list(choices)
            if value not in choices:
                near = difflib.get_close_matches(value, choices, n=1, cutoff=0.6)
                hint = f" (did you mean '{near[0]}'?)" if near else ""
                raise self.error(name, f"unknown value {value!r}{hint}; expected one of: {', '.join(choices)}")
        return value

    def float(self, name: str, default: Any = _MISSING, *, min: float | None = None,
              max: float | None = None, min_exclusive: bool = False) -> Any:
        value = self._get(name, default)
        if value is default and name not in self.data:
            return value
        return self.check_float(name, value, min=min, max=max, min_exclusive=min_exclusive)

    def check_float(self, name: str, value: Any, *, min: float | None = None,
                    max: float | None = None, min_exclusive: bool = False) -> float:
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise self.error(name, f"must be a number, got {_type_name(value)} {_show(value)}")
        try:
            value = float(value)
        except OverflowError:  # TOML integers are unbounded; float() of a huge one overflows
            raise self.error(name, "must be a finite number, got an integer too large for a number") from None
        if not math.isfinite(value):
            raise self.error(name, f"must be a finite number, got {value}")
        if min is not None:
            if min_exclusive and not value > min:
                raise self.error(name, f"must be greater than {min:g}, got {value:g}")
            if not min_exclusive and value < min:
                raise self.error(name, f"must be at least {min:g}, got {value:g}")
        if max is not None and value > max:
            raise self.error(name, f"must be at most {max:g}, got {value:g}")
        return value

    def int(self, name: str, default: Any = _MISSING, *, min: int | None = None,
            max: int | None = None) -> Any:
        value = self._get(name, default)
        if value is default and name not in self.data:
            return value
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.error(name, f"must be a whole number, got {_type_name(value)} {_show(value)}")
        if min is not None and value < min:
            raise self.error(name, f"must be at least {min}, got {value}")
        if max is not None and value > max:
            raise self.error(name, f"must be at most {max}, got {value}")
        return value

    def bool(self, name: str, default: Any = _MISSING) -> Any:
        value = self._get(name, default)
        if value is default and name not in self.data:
            return value
        if not isinstance(value, bool):
            raise self.error(name, f"must be true or false, got {_type_name(value)} {_show(value)}")
        return value

    # -- containers -------------------------------------------------------------
    def table(self, name: str, default: Any = _MISSING) -> Any:
        value = self._get(name, default)
        if value is default and name not in self.data:
            return value
        return Table(value, self.file, self.key(name))

    def tables(self, name: str, default: Any = _MISSING) -> Any:
        """An array of tables (``[[band]]``) as a list of Table with paths ``band[i]``."""
        value = self._get(name, default)
        if value is default and name not in self.data:
            return value
        if not isinstance(value, list):
            raise self.error(name, f"must be an array of tables ([[{name}]]), got {_type_name(value)}")
        out = []
        for i, item in enumerate(value):
            out.append(Table(item, self.file, f"{self.key(name)}[{i}]"))
        return out

    def file_or_table(self, name: str, base_dir: Path | str | None, *, load, parse, what: str) -> Any:
        """A value given either as a file name (relative to `base_dir`) or as an inline
        table: ``load(path)`` reads the file, ``parse(data, key_path)`` the table.
        Raises ConfigError for a missing file or another type. `what` names the thing in
        messages (for example "board command-map")."""
        raw = self._get(name, _MISSING)
        if isinstance(raw, str):
            p = Path(raw)
            if not p.is_absolute() and base_dir is not None:
                p = Path(base_dir) / p
            if not p.is_file():
                raise self.error(name, f"{what} file not found: {p}")
            return load(p)
        if isinstance(raw, dict):
            return parse(raw, self.key(name))
        raise self.error(name, "must be a file name or a table")

    def float_list(self, name: str, default: Any = _MISSING, *, min: float | None = None,
                   min_exclusive: bool = False, nonempty: bool = True) -> Any:
        value = self._get(name, default)
        if value is default and name not in self.data:
            return value
        if not isinstance(value, list):
            raise self.error(name, f"must be an array of numbers, got {_type_name(value)}")
        if nonempty and not value:
            raise self.error(name, "must not be empty")
        return [self.check_float(f"{name}[{i}]", v, min=min, min_exclusive=min_exclusive)
                for i, v in enumerate(value)]

    def pairs(self, name: str, default: Any = _MISSING) -> Any:
        """An array of ``[x, y]`` number pairs."""
        value = self._get(name, default)
        if value is default and name not in self.data:
            return value
        if not isinstance(value, list) or not value:
            raise self.error(name, "must be a non-empty array of [x, y] pairs")
        out = []
        for i, item in enumerate(value):
            if not isinstance(item, list) or len(item) != 2:
                raise self.error(f"{name}[{i}]", f"must be a pair [x, y], got {_show(item)}")
            out.append((self.check_float(f"{name}[{i}][0]", item[0]),
                        self.check_float(f"{name}[{i}][1]", item[1])))
        return out
