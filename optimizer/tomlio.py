"""Reading TOML user files with errors that name the file, the key and the fix."""

from __future__ import annotations

import builtins
import difflib
import math
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import Any

from .exceptions import InputError

__all__ = [
    "TableReader",
    "load_toml",
    "suggestion",
    "tomllib",
]

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover
    import tomli as tomllib

_MISSING = object()


def load_toml(path: Path, error: type[InputError], kind: str = "problem") -> dict[str, Any]:
    """Parse a TOML file of ``kind`` (see ``inputs.LIMITS``); a missing, special or oversize
    file or a syntax error becomes ``error``."""
    from .inputs import read_bytes

    raw = read_bytes(path, kind, error)
    try:
        return tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError as err:
        raise error(path, "", "is not UTF-8 text") from err
    except tomllib.TOMLDecodeError as err:
        raise error(path, "", f"TOML syntax error: {err}") from err


def suggestion(word: str, choices: Sequence[str]) -> str:
    """`` (did you mean 'x'?)`` for the closest of ``choices``, or empty."""
    close = difflib.get_close_matches(word, list(choices), n=1, cutoff=0.6)
    return f" (did you mean '{close[0]}'?)" if close else ""


class TableReader:
    """Typed access to one TOML table; ``done()`` rejects keys nobody asked for."""

    def __init__(
        self, data: Any, path: object, prefix: builtins.str, error: type[InputError]
    ) -> None:
        if not isinstance(data, dict):
            raise error(path, prefix.rstrip("."), "must be a table")
        self.data = data
        self.path = path
        self.prefix = prefix
        self.error = error
        self.seen: set[builtins.str] = set()

    def fail(self, key: builtins.str, reason: builtins.str) -> InputError:
        return self.error(self.path, f"{self.prefix}{key}", reason)

    def has(self, key: builtins.str) -> builtins.bool:
        return key in self.data

    def raw(self, key: builtins.str, default: Any = _MISSING) -> Any:
        self.seen.add(key)
        if key not in self.data:
            if default is _MISSING:
                close = difflib.get_close_matches(key, [str(k) for k in self.data], n=1, cutoff=0.6)
                hint = f" (found '{close[0]}': misspelt?)" if close else ""
                raise self.fail(key, f"is required but missing{hint}")
            return default
        return self.data[key]

    def str(
        self,
        key: builtins.str,
        default: Any = _MISSING,
        choices: Sequence[builtins.str] | None = None,
    ) -> Any:
        v = self.raw(key, default)
        if v is default and default is not _MISSING:
            return v
        if not isinstance(v, str):
            raise self.fail(key, f"must be a string, got {v!r}")
        if choices is not None and v not in choices:
            raise self.fail(
                key, f"'{v}' is not one of {', '.join(choices)}{suggestion(v, choices)}"
            )
        return v

    def bool(self, key: builtins.str, default: Any = _MISSING) -> Any:
        v = self.raw(key, default)
        if not isinstance(v, bool):
            raise self.fail(key, f"must be true or false, got {v!r}")
        return v

    def float(
        self,
        key: builtins.str,
        default: Any = _MISSING,
        min_value: builtins.float | None = None,
        max_value: builtins.float | None = None,
        strict_min: builtins.bool = False,
    ) -> Any:
        if key not in self.data and default is not _MISSING:
            self.seen.add(key)
            return default
        v = self.raw(key, default)
        return self._check_number(key, v, min_value, max_value, strict_min)

    def _check_number(
        self,
        key: builtins.str,
        v: Any,
        lo: builtins.float | None,
        hi: builtins.float | None,
        strict_lo: builtins.bool,
    ) -> builtins.float:
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            raise self.fail(key, f"must be a number, got {repr(v)[:60]}")
        x = float(v)
        if not math.isfinite(x):
            raise self.fail(key, f"must be finite, got {repr(v)[:60]}")
        if lo is not None and (x < lo or (strict_lo and x <= lo)):
            raise self.fail(key, f"must be {'>' if strict_lo else '>='} {lo:g}, got {v!r}")
        if hi is not None and x > hi:
            raise self.fail(key, f"must be <= {hi:g}, got {v!r}")
        return x

    def int(
        self,
        key: builtins.str,
        default: Any = _MISSING,
        min_value: builtins.int | None = None,
        max_value: builtins.int | None = None,
    ) -> Any:
        if key not in self.data and default is not _MISSING:
            self.seen.add(key)
            return default
        v = self.raw(key, default)
        if isinstance(v, bool) or not isinstance(v, int):
            raise self.fail(key, f"must be a whole number, got {v!r}")
        if min_value is not None and v < min_value:
            raise self.fail(key, f"must be >= {min_value}, got {v}")
        if max_value is not None and v > max_value:
            raise self.fail(key, f"must be <= {max_value}, got {v}")
        return v

    def floats(
        self,
        key: builtins.str,
        default: Any = _MISSING,
        length: builtins.int | None = None,
        min_value: builtins.float | None = None,
        max_value: builtins.float | None = None,
    ) -> Any:
        v = self.raw(key, default)
        if v is default and default is not _MISSING:
            return v
        if not isinstance(v, list):
            raise self.fail(key, f"must be a list of numbers, got {str(v)[:60]!r}")
        if length is not None and len(v) != length:
            raise self.fail(key, f"must have {length} numbers, got {len(v)}")
        return tuple(self._check_number(key, x, min_value, max_value, False) for x in v)

    def strings(self, key: builtins.str, default: Any = _MISSING) -> Any:
        v = self.raw(key, default)
        if v is default and default is not _MISSING:
            return v
        if not isinstance(v, list) or not all(isinstance(x, str) for x in v):
            raise self.fail(key, f"must be a list of strings, got {v!r}")
        return tuple(v)

    def table(self, key: builtins.str, required: builtins.bool = False) -> TableReader:
        v = self.raw(key, _MISSING if required else {})
        return TableReader(v, self.path, f"{self.prefix}{key}.", self.error)

    def table_list(self, key: builtins.str) -> list[TableReader]:
        v = self.raw(key, [])
        if isinstance(v, dict):
            v = [v]
        if not isinstance(v, list) or not all(isinstance(x, dict) for x in v):
            raise self.fail(key, "must be a list of tables ([[" + key + "]])")
        return [
            TableReader(x, self.path, f"{self.prefix}{key}[{i}].", self.error)
            for i, x in enumerate(v)
        ]

    def done(self) -> None:
        """Raise for the first key that was never read, with a close-match suggestion."""
        for key in self.data:
            if key not in self.seen:
                known = sorted(self.seen)
                raise self.fail(
                    key,
                    f"unknown key{suggestion(key, known)}; "
                    f"known here: {', '.join(known) or 'none'}",
                )
