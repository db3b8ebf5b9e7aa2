"""Reading TOML files with errors that name the file, the line and the key."""

from __future__ import annotations

import hashlib
import re
import tomllib
from dataclasses import dataclass
from enum import StrEnum
from pathlib import Path
from typing import Any, TypeVar

from metricforge.errors import SpecError, closest

E = TypeVar("E", bound=StrEnum)


@dataclass(frozen=True)
class TomlFile:
    path: Path
    text: str
    data: dict[str, Any]

    @property
    def name(self) -> str:
        return str(self.path)

    @property
    def sha256(self) -> str:
        return hashlib.sha256(self.text.encode("utf-8")).hexdigest()

    def line_of(self, *keys: str) -> int | None:
        """Best-effort line of a key path: the table header, then the key inside it."""
        lines = self.text.splitlines()
        start = 0
        if len(keys) > 1:
            header = re.compile(
                r"^\s*\[+\s*" + r"\s*\.\s*".join(re.escape(k) for k in keys[:-1]) + r"\s*\]+"
            )
            for i, line in enumerate(lines):
                if header.match(line):
                    start = i
                    break
        key = re.compile(r"^\s*" + re.escape(keys[-1]) + r"\s*=")
        for i in range(start, len(lines)):
            if key.match(lines[i]):
                return i + 1
        return start + 1 if len(keys) > 1 and start else None

    def error(self, message: str, *keys: str, suggestion: str | None = None) -> SpecError:
        return SpecError(
            message,
            file=self.name,
            line=self.line_of(*keys) if keys else None,
            key=".".join(keys) if keys else None,
            suggestion=suggestion,
        )


MAX_TOML_BYTES = 1_000_000


def read_toml(path: Path) -> TomlFile:
    try:
        if path.is_file() and path.stat().st_size > MAX_TOML_BYTES:
            raise SpecError(f"file is larger than {MAX_TOML_BYTES} bytes", file=str(path))
        raw = path.read_bytes()
    except FileNotFoundError:
        raise SpecError("file not found", file=str(path)) from None
    except OSError as err:
        raise SpecError(f"cannot read file: {err.strerror or err}", file=str(path)) from None
    except ValueError as err:  # e.g. a NUL character in the path
        raise SpecError(f"cannot read file: {err}", file=str(path)) from None
    if len(raw) > MAX_TOML_BYTES:
        raise SpecError(f"file is larger than {MAX_TOML_BYTES} bytes", file=str(path))
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise SpecError("file is not valid UTF-8", file=str(path)) from None
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        message = str(err)
        match = re.search(r"\(at line (\d+), column \d+\)", message)
        line = int(match.group(1)) if match else None
        message = re.sub(r"\s*\(at line \d+, column \d+\)", "", message)
        raise SpecError(f"malformed TOML: {message}", file=str(path), line=line) from None
    except RecursionError:
        raise SpecError("malformed TOML: nested too deeply", file=str(path)) from None
    return TomlFile(path=path, text=text, data=data)


class Section:
    """Typed access to one table of a TOML file, naming the key path on errors."""

    def __init__(self, file: TomlFile, keys: tuple[str, ...], table: object) -> None:
        self.file = file
        self.keys = keys
        if not isinstance(table, dict):
            raise file.error("expected a table", *keys)
        self.table: dict[str, Any] = table

    def error(
        self, message: str, key: str | None = None, suggestion: str | None = None
    ) -> SpecError:
        keys = (*self.keys, key) if key else self.keys
        return self.file.error(message, *keys, suggestion=suggestion)

    def check_keys(self, allowed: set[str]) -> None:
        for key in self.table:
            if key not in allowed:
                raise self.error("unknown key", key, suggestion=closest(key, sorted(allowed)))

    def has(self, key: str) -> bool:
        return key in self.table

    def _get(self, key: str, types: type | tuple[type, ...], what: str, default: Any) -> Any:
        if key not in self.table:
            if default is _REQUIRED:
                raise self.error("required key is missing", key)
            return default
        value = self.table[key]
        if isinstance(value, bool) and bool not in (
            types if isinstance(types, tuple) else (types,)
        ):
            raise self.error(f"expected {what}, got a boolean", key)
        if not isinstance(value, types):
            raise self.error(f"expected {what}, got {type(value).__name__}", key)
        return value

    def text(self, key: str, default: Any = None) -> Any:
        return self._get(key, str, "a string", default)

    def req_str(self, key: str) -> str:
        value: str = self._get(key, str, "a string", _REQUIRED)
        if not value.strip():
            raise self.error("must not be empty", key)
        return value

    def number(self, key: str, default: Any = None) -> Any:
        value = self._get(key, (int, float), "a number", default)
        if value is None:
            return None
        try:
            return float(value)
        except OverflowError:
            raise self.error("number out of range", key) from None

    def flag(self, key: str, default: bool = False) -> bool:
        value: bool = self._get(key, bool, "true or false", default)
        return value

    def integer(self, key: str, default: Any = None) -> Any:
        return self._get(key, int, "an integer", default)

    def str_list(self, key: str, default: Any = None) -> Any:
        value = self._get(key, (list, str), "a list of strings", default)
        if isinstance(value, str):
            return [value]
        if value is not None and not all(isinstance(v, str) for v in value):
            raise self.error("expected a list of strings", key)
        return value

    def choice(self, key: str, enum: type[E], what: str, default: str | None = None) -> E:
        """The value of ``key`` as a member of ``enum``, with a "did you mean" if unknown."""
        text = self.req_str(key) if default is None else self.text(key, default)
        try:
            return enum(text)
        except ValueError:
            names = [m.value for m in enum]
            raise self.error(
                f"unknown {what} '{text}'; expected one of {names}",
                key,
                suggestion=closest(str(text), names),
            ) from None

    def sub(self, key: str) -> Section:
        if key not in self.table:
            raise self.error("required table is missing", key)
        return Section(self.file, (*self.keys, key), self.table[key])


_REQUIRED = object()
