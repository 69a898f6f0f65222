"""Reading and validating cubecast's TOML files: one reader, one set of rules, one error format.

Every error is a CubecastError whose message names the file, the section, the field, the value and
the rule, in one format:

    yard_sensor.toml: [chirp] slope_hz_per_s = -3: must be > 0

API (everything else in this module is private):

    read_text(path, what) -> str          read a UTF-8 file; `what` names it in errors
                                          ("cannot read sensor description x.toml: ...")
    parse_toml(text, origin=None)         -> Document; `origin` (a file name or "sensor message
                                          from ...") starts every message; None leaves it out
    read_toml(path, what) -> Document     both: origin is the path

    Document     .data (the parsed dict, never modified), .text, .origin
                 .check_sections(known, hint="")     unknown top-level names are errors
                 .section(name, required=True)       -> Section ([name]; absent and not required:
                                                        an empty section, so defaults apply)
                 .tables(name, start=0)              -> list[Section] ([[name]] #0, #1, ...)
                 .error(message)                     -> CubecastError "origin: message"
    Section      .label ("[chirp]", "[[target]] #0"; may be reassigned), .table, .origin
                 .number(name, default, gt=, ge=, lt=, le=) -> float (finite; ints accepted)
                 .integer(name, default, gt=, ge=, lt=, le=) -> int (not bool, not 2.0)
                 .boolean(name, default) -> bool
                 .string(name, default, pattern=, rule=) -> str (pattern: re.fullmatch)
                 .choice(name, options, default) -> str
                 .numbers(name, default, length=, integer=) -> list of float (or int)
                 .number_rows(name, width, default, columns=) -> list of lists of float, e.g.
                                          [[x, z], ...]; a bad row is named: `tx[1] = [1, 0, 3]`
                 .dataclass_values(cls) -> dict: every field of a dataclass with simple defaults
                                          (bool, int, float, str), typed as its default, for cls(**d)
                 .section(name, required=True) / .tables(name, start=0): nested tables
                 .raw(name, default): unchecked value (marks the field as known); .has(name)
                 .fail(name, value, rule), .error(message) -> CubecastError to raise
                 .check_unknown(expected=())         fields never asked for (nor in expected)
                                                     are errors

`default` omitted means the field is required ("[link] tx_power_dbm is missing"). A default is
returned as given, unchecked (so None can mean "not given"). Values in messages are shown with
repr(). Rules read "must be > 0", "must be >= 8", "must be in [0, 50]" (interval notation),
"must be a whole number", "must be one of 'complex', 'real'"; a misspelt name is answered with
"unknown field antena_gain (did you mean antenna_gain?)", and a required field that is missing next
to a field of a close name with "slope_hz_per_s is missing (slope_hz_per_sec is given: did you mean
slope_hz_per_s?)". The parsed document is left as TOML produced it, so a digest of `Document.data` is a digest
of the file's content, not of its formatting.
"""

from __future__ import annotations

import dataclasses
import difflib
import math
import re
import tomllib
from pathlib import Path
from typing import Any, Iterable

from .errors import CubecastError, is_integer, is_real

REQUIRED: Any = ...  # the `default` of a required field


def _where(origin: str | None) -> str:
    return f"{origin}: " if origin else ""


def _g(x: float) -> str:
    return f"{x:g}" if isinstance(x, float) else str(x)


def _bounds_rule(gt, ge, lt, le) -> str:
    """'must be > 0', 'must be >= 8', 'must be in [0, 50]', 'must be in (0, 0.5)'."""
    low = (gt, "(") if gt is not None else (ge, "[") if ge is not None else None
    high = (lt, ")") if lt is not None else (le, "]") if le is not None else None
    if low and high:
        return f"must be in {low[1]}{_g(low[0])}, {_g(high[0])}{high[1]}"
    if low:
        return f"must be {'>' if low[1] == '(' else '>='} {_g(low[0])}"
    return f"must be {'<' if high[1] == ')' else '<='} {_g(high[0])}"


def _in_bounds(v, gt, ge, lt, le) -> bool:
    return ((gt is None or v > gt) and (ge is None or v >= ge)
            and (lt is None or v < lt) and (le is None or v <= le))


def _unknown(kind: str, names: list[str], known: Iterable[str], show=lambda n: n) -> str:
    """"unknown field antena_gain (did you mean antenna_gain?)", "unknown fields x, y"."""
    known = sorted(known)

    def one(name: str) -> str:
        close = difflib.get_close_matches(name, known, n=1)
        return show(name) + (f" (did you mean {show(close[0])}?)" if close else "")
    return f"unknown {kind}{'s' if len(names) > 1 else ''} " + ", ".join(one(n) for n in names)


def _finite(v) -> bool:
    return is_real(v) and math.isfinite(v)


# ---- reading --------------------------------------------------------------------------------------

def read_text(path: str | Path, what: str) -> str:
    """The file's text; a missing, unreadable or non-UTF-8 file raises CubecastError naming `what`
    and the path, e.g. "cannot read sensor description x.toml: No such file or directory"."""
    path = Path(path)
    try:
        return path.read_text(encoding="utf-8")
    except OSError as exc:
        raise CubecastError(f"cannot read {what} {path}: {exc.strerror or exc}") from None
    except UnicodeDecodeError as exc:
        raise CubecastError(f"cannot read {what} {path}: not UTF-8 text (byte {exc.start})") from None


def parse_toml(text: str, origin: str | None = None) -> Document:
    """Parse TOML text; invalid TOML raises CubecastError "origin: not valid TOML: <where, why>"."""
    try:
        data = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise CubecastError(f"{_where(origin)}not valid TOML: {exc}") from None
    return Document(data, text, origin)


def read_toml(path: str | Path, what: str) -> Document:
    """read_text + parse_toml, with the path as the origin."""
    return parse_toml(read_text(path, what), str(path))


# ---- tables ---------------------------------------------------------------------------------------

class _Tables:
    """What a document and a section share: named sub-tables and arrays of tables."""

    origin: str | None
    table: dict
    _path: str  # dotted TOML path of this table ("" for the document)

    def _take(self, name: str) -> Any:
        return self.table.get(name)

    def _child_path(self, name: str) -> str:
        return f"{self._path}.{name}" if self._path else name

    def section(self, name: str, required: bool = True) -> Section:
        path = self._child_path(name)
        value = self._take(name)
        if value is None:
            if required:
                raise CubecastError(f"{_where(self.origin)}missing section [{path}]")
            value = {}
        if not isinstance(value, dict):
            raise CubecastError(f"{_where(self.origin)}{path} = {value!r}: must be a table ([{path}])")
        return Section(value, f"[{path}]", self.origin, path)

    def tables(self, name: str, start: int = 0) -> list[Section]:
        """The entries of an array of tables `[[name]]`, labelled `[[name]] #start`, #start+1, ...
        Absent: an empty list."""
        path = self._child_path(name)
        value = self._take(name)
        if value is None:
            return []
        if not isinstance(value, list) or any(not isinstance(t, dict) for t in value):
            raise CubecastError(f"{_where(self.origin)}{path} = {value!r}: must be an array of tables "
                                f"([[{path}]] entries)")
        return [Section(t, f"[[{path}]] #{i + start}", self.origin, path) for i, t in enumerate(value)]

    def error(self, message: str) -> CubecastError:
        return CubecastError(f"{_where(self.origin)}{message}")


class Document(_Tables):
    """A parsed TOML file: its top-level sections. `data` is exactly what TOML produced."""

    def __init__(self, data: dict, text: str, origin: str | None):
        self.data, self.text, self.origin = data, text, origin
        self.table, self._path = data, ""

    def check_sections(self, known: Iterable[str], hint: str = "") -> None:
        """Top-level names outside `known` are errors ("unknown section [adcc] (did you mean adc?)");
        `hint` is appended after "; "."""
        known = list(known)
        unknown = sorted(set(self.data) - set(known))
        if unknown:
            raise self.error(_unknown("section", unknown, known, lambda n: f"[{n}]") + (f"; {hint}" if hint else ""))


class Section(_Tables):
    """Typed access to one TOML table. Each accessor marks its field as known (see check_unknown)."""

    def __init__(self, table: dict, label: str, origin: str | None, path: str = ""):
        self.table, self.label, self.origin, self._path = table, label, origin, path
        self.used: set[str] = set()

    def _take(self, name: str) -> Any:
        self.used.add(name)
        return self.table.get(name)

    # -- errors
    def fail(self, name: str, value: Any, rule: str) -> CubecastError:
        """"origin: [label] name = value: rule"."""
        return CubecastError(f"{_where(self.origin)}{self.label} {name} = {value!r}: {rule}")

    def error(self, message: str) -> CubecastError:
        """"origin: [label] message" (for rules about several fields)."""
        return CubecastError(f"{_where(self.origin)}{self.label} {message}")

    # -- access
    def has(self, name: str) -> bool:
        return name in self.table

    def raw(self, name: str, default: Any = REQUIRED) -> Any:
        self.used.add(name)
        if name not in self.table:
            if default is REQUIRED:
                raise self.error(f"{name} is missing{self._given_instead(name)}")
            return default
        return self.table[name]

    def _given_instead(self, name: str) -> str:
        """" (slope_hz_per_sec is given: did you mean slope_hz_per_s?)" when a field of a close name,
        not read so far, is in the table: the likely misspelling of a required field is named, though
        a reader that checks unknown fields only after reading never gets that far."""
        unread = [k for k in self.table if k not in self.used and isinstance(k, str)]
        close = difflib.get_close_matches(name, unread, n=1)
        return f" ({close[0]} is given: did you mean {name}?)" if close else ""

    def _get(self, name: str, default: Any) -> tuple[bool, Any]:
        """(given, value): a field not given returns its default, which is not checked."""
        given = name in self.table
        return given, self.raw(name, default)

    def number(self, name: str, default: Any = REQUIRED, *, gt: float | None = None, ge: float | None = None,
               lt: float | None = None, le: float | None = None) -> float:
        """A finite number (TOML integer or float; returned as float), optionally bounded."""
        given, value = self._get(name, default)
        if not given:
            return value
        if not _finite(value):
            raise self.fail(name, value, "must be a finite number")
        if not _in_bounds(value, gt, ge, lt, le):
            raise self.fail(name, value, _bounds_rule(gt, ge, lt, le))
        return float(value)

    def integer(self, name: str, default: Any = REQUIRED, *, gt: int | None = None, ge: int | None = None,
                lt: int | None = None, le: int | None = None) -> int:
        """A whole number (a TOML integer: not a bool, not 2.0), optionally bounded."""
        given, value = self._get(name, default)
        if not given:
            return value
        if not is_integer(value):
            raise self.fail(name, value, "must be a whole number")
        if not _in_bounds(value, gt, ge, lt, le):
            raise self.fail(name, value, _bounds_rule(gt, ge, lt, le))
        return int(value)

    def boolean(self, name: str, default: Any = REQUIRED) -> bool:
        given, value = self._get(name, default)
        if given and not isinstance(value, bool):
            raise self.fail(name, value, "must be true or false")
        return value

    def string(self, name: str, default: Any = REQUIRED, *, pattern: str | None = None,
               rule: str | None = None) -> str:
        """A string; with `pattern`, one that re.fullmatch-es it (`rule` says so in words, and is
        the message for a value that is not a string too)."""
        given, value = self._get(name, default)
        if not given:
            return value
        if not isinstance(value, str):
            raise self.fail(name, value, rule or "must be a string")
        if pattern is not None and not re.fullmatch(pattern, value):
            raise self.fail(name, value, rule or f"must match {pattern}")
        return value

    def choice(self, name: str, options: Iterable[str], default: Any = REQUIRED) -> str:
        options = tuple(options)
        given, value = self._get(name, default)
        if given and (not isinstance(value, str) or value not in options):
            raise self.fail(name, value, f"must be one of {', '.join(repr(o) for o in options)}")
        return value

    def numbers(self, name: str, default: Any = REQUIRED, *, length: int | None = None,
                integer: bool = False) -> list:
        """A list of finite numbers (floats) or, with `integer`, of whole numbers (ints): exactly
        `length` of them, or at least one."""
        given, value = self._get(name, default)
        if not given:
            return value
        kind = "whole numbers" if integer else "finite numbers"
        ok = is_integer if integer else _finite
        if (not isinstance(value, list) or (len(value) != length if length is not None else not value)
                or not all(ok(v) for v in value)):
            raise self.fail(name, value, f"must be a list of {length if length is not None else 'one or more'} {kind}")
        return [int(v) for v in value] if integer else [float(v) for v in value]

    def number_rows(self, name: str, width: int, default: Any = REQUIRED, *, columns: str = "") -> list[list[float]]:
        """A non-empty list of rows, each a list of `width` finite numbers; `columns` names them in
        the rule ("x, z"). A bad row is named by its index: `name[1] = [1, 0, 3]`."""
        given, value = self._get(name, default)
        if not given:
            return value
        shape = f"[{columns}]" if columns else f"{width}-number"
        if not isinstance(value, list) or not value:
            raise self.fail(name, value, f"must be a non-empty list of {shape} entries")
        for i, row in enumerate(value):
            if not isinstance(row, list) or len(row) != width or not all(_finite(v) for v in row):
                raise self.fail(f"{name}[{i}]", row, f"must be a list of {width} finite numbers")
        return [[float(v) for v in row] for row in value]

    def dataclass_values(self, cls) -> dict[str, Any]:
        """Every field of dataclass `cls` from this section, typed as the field's default (bool,
        int, float or str; a float field takes a TOML integer as a float); a field not given keeps
        its default. Names that are not fields of `cls` are errors. Returns kwargs for cls(**d);
        the rules between values are the dataclass's own."""
        fields = dataclasses.fields(cls)
        names = {f.name for f in fields}
        for key in self.table:
            if key not in names:
                raise self.error(_unknown("field", [key], names))
        readers = {bool: self.boolean, int: self.integer, float: self.number, str: self.string}
        out = {}
        for f in fields:
            kind = type(f.default)
            if kind not in readers:
                raise TypeError(f"{cls.__name__}.{f.name}: dataclass_values takes fields with a bool, int, "
                                f"float or str default")
            out[f.name] = readers[kind](f.name, f.default)
        return out

    def check_unknown(self, expected: Iterable[str] = ()) -> None:
        """Fields this section was never asked for (and not in `expected`, the fields still to be
        read) are errors: "[link] unknown field antena_gain (did you mean antenna_gain?)", naming
        the known field it is closest to."""
        known = self.used | set(expected)
        unknown = sorted(set(self.table) - known)
        if unknown:
            raise self.error(_unknown("field", unknown, known))
