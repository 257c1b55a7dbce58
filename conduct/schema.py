"""A tiny schema reader for study-file tables.

Each table of a study file is read key by key with a converter and a default:
:class:`TableReader` names the file and the dotted key in every message, turns a
misspelt required key into a did-you-mean hint, and :meth:`TableReader.finish`
refuses keys nobody asked for.  Converters check types only; what the values
mean is checked by the modules that own them (:mod:`conduct.study`,
:mod:`conduct.study_data`).
"""

from __future__ import annotations

import difflib
import math
import unicodedata
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import Any

from conduct.errors import StudyFileError, suggest

__all__ = ["REQUIRED", "TableReader", "quote", "resolve_path", "sub_table"]

#: Marks a key without a default: leaving it out is an error.
REQUIRED = object()


class TableReader:
    """Reads one TOML table, key by key, and complains precisely.

    Parameters
    ----------
    table : mapping
        The TOML table.
    where : str
        Its dotted name in the study file ("" for the top level).
    file : Path
        The study file, for messages.
    """

    def __init__(self, table: Mapping[str, Any], where: str, file: Path) -> None:
        self.table = dict(table)
        self.where = where
        self.file = file
        self.used: set[str] = set()

    def _name(self, key: str) -> str:
        return f"{self.where}.{key}" if self.where else key

    def fail(self, key: str, message: str) -> StudyFileError:
        return StudyFileError(f"Study file {self.file}: key '{self._name(key)}' {message}")

    def get(self, key: str, conv: Callable[[Any, str], Any], default: Any = REQUIRED) -> Any:
        self.used.add(key)
        if key not in self.table:
            if default is REQUIRED:
                # a misspelt required key would otherwise hide behind "missing"
                near = difflib.get_close_matches(key, [str(k) for k in self.table], n=1)
                hint = (f" The table has an unknown key '{self._name(near[0])}' (did you mean "
                        f"'{key}'?)." if near else "")
                raise StudyFileError(
                    f"Study file {self.file}: required key '{self._name(key)}' is missing."
                    + hint
                )
            return default
        return conv(self.table[key], key)

    def finish(self) -> None:
        for key in self.table:
            if key not in self.used:
                hint = suggest(key, self.used)
                valid = ", ".join(sorted(self.used))
                raise StudyFileError(
                    f"Study file {self.file}: unknown key '{self._name(key)}'{hint}. "
                    f"Valid keys here: {valid}."
                )

    # converters --------------------------------------------------------------------
    def string(self, value: Any, key: str) -> str:
        if not isinstance(value, str) or not value.strip():
            raise self.fail(key, f"must be a non-empty string, got {value!r}.")
        return unicodedata.normalize("NFC", value.strip())

    def opt_string(self, value: Any, key: str) -> str | None:
        if value == "":
            return None
        return self.string(value, key)

    def strings(self, value: Any, key: str) -> tuple[str, ...]:
        if isinstance(value, str):
            raise self.fail(key, f"must be a list of names, e.g. [{quote(value)}], got "
                                 f"the bare string {value!r}.")
        if not isinstance(value, list) or not all(isinstance(v, str) and v.strip() for v in value):
            raise self.fail(key, f"must be a list of column names (strings), got {value!r}.")
        out = tuple(unicodedata.normalize("NFC", v.strip()) for v in value)
        dupes = sorted({v for v in out if out.count(v) > 1})
        if dupes:
            raise self.fail(key, f"lists {', '.join(dupes)} more than once.")
        return out

    def number(self, value: Any, key: str) -> float:
        ok = isinstance(value, int | float) and not isinstance(value, bool)
        if not ok or not math.isfinite(value):
            raise self.fail(key, f"must be a finite number, got {value!r}.")
        return float(value)

    def boolean(self, value: Any, key: str) -> bool:
        if not isinstance(value, bool):
            raise self.fail(key, f"must be true or false, got {value!r}.")
        return value

    def integer(self, value: Any, key: str) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.fail(key, f"must be an integer, got {value!r}.")
        return value

    def choice(self, options: tuple[str, ...]) -> Callable[[Any, str], str]:
        def conv(value: Any, key: str) -> str:
            if not isinstance(value, str) or value not in options:
                hint = suggest(str(value), options)
                raise self.fail(
                    key, f"is {value!r}{hint}; allowed values: {', '.join(options)}."
                )
            return value

        return conv

    def choices(self, options: tuple[str, ...]) -> Callable[[Any, str], tuple[str, ...]]:
        one = self.choice(options)

        def conv(value: Any, key: str) -> tuple[str, ...]:
            items = self.strings(value, key) if value != [] else ()
            return tuple(one(v, key) for v in items)

        return conv


def quote(text: str) -> str:
    """``text`` as a TOML basic string, for examples in messages."""
    return '"' + text.replace("\\", "\\\\").replace('"', '\\"') + '"'


def sub_table(reader: TableReader, key: str, required: bool) -> dict[str, Any] | None:
    """Read the sub-table ``key`` of ``reader``'s table (None when absent and optional)."""
    reader.used.add(key)
    if key not in reader.table:
        if required:
            raise StudyFileError(f"Study file {reader.file}: required table [{key}] is missing.")
        return None
    value = reader.table[key]
    if not isinstance(value, dict):
        raise StudyFileError(
            f"Study file {reader.file}: '{key}' must be a table ([{key}]), got {value!r}."
        )
    return value


def resolve_path(base: Path, raw: str, key: str = "a path") -> Path:
    """``raw`` as an absolute path, relative paths taken from the folder ``base``.

    Raises
    ------
    StudyFileError
        When the path holds a control character (a NUL byte, say), naming ``key``.
    """
    if any(ord(ch) < 32 for ch in raw):
        raise StudyFileError(
            f"Study file in {base}: key '{key}' holds the path {raw!r}, which contains a "
            "control character; write a plain path."
        )
    try:
        p = Path(raw).expanduser()
    except RuntimeError:  # '~user' with an unknown user: take the text literally
        p = Path(raw)
    return p if p.is_absolute() else (base / p)
