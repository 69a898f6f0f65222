"""Message schemas: bounded msgpack decoding, then typed validation against msgspec Structs.

The public wire (wire.py) and the worker protocol (workproto.py) decode every header in two steps:

1. `unpack`: msgpack with every length bounded (strings and binaries by the header's size limit,
   arrays and maps by MAX_ENTRIES), string keys only, no extension types (so nothing is ever
   unpickled or evaluated), exactly one value and that a map;
2. `validate`: `msgspec.convert` of that map into the kind's Struct, whose annotations are the rules
   (types, bounds, patterns, lengths; bools are never numbers). Keys a schema does not define are
   ignored.

A field's rule is written once, in its annotation's `Meta(description=...)`, and names the field in
the error: "<what> header field '<name>' = <value>: <rule>". `Meta(extra={"reason": ...})` sets the
rejection reason of a field (default "malformed"; a missing field is always "malformed"). Errors are
made by the caller's `error(reason, message)`, so each protocol raises its own error type.

This module imports nothing of the daemon (msgpack and msgspec only); the viewer may import it.
"""

from __future__ import annotations

import functools
import re
import sys
import typing
from typing import Annotated, Any, Callable

import msgpack
import msgspec
from msgspec import Meta, Struct

MAX_ENTRIES = 1024  # msgpack array and map lengths
MAX_FLOAT = sys.float_info.max  # msgspec bounds must be finite: [-max, max] is "finite"
U64_MAX = (1 << 64) - 1

ErrorFactory = Callable[[str, str], Exception]


class Schema(Struct, frozen=True):
    """Base of every header schema (unknown keys are ignored)."""


# ---- field types: the rule is the annotation; its description is what an error says ----------------

def integer(lo: int = 0, hi: int | None = None) -> Any:
    """An int in lo..hi (default 0..2^64-1, msgpack's largest unsigned; msgspec bounds fit int64)."""
    text = f"must be an integer in {lo}..{U64_MAX if hi is None else hi}"
    return Annotated[int, Meta(ge=lo, description=text) if hi is None else Meta(ge=lo, le=hi, description=text)]


def text(max_chars: int, min_chars: int = 1) -> Any:
    return Annotated[str, Meta(min_length=min_chars, max_length=max_chars,
                               description=f"must be a string of {min_chars}..{max_chars} characters")]


def optional(tp: Any) -> Any:
    """`tp` or nil, the rule's text saying so."""
    return Annotated[tp | None, Meta(description=_description(tp) + " or nil")]


Finite = Annotated[float, Meta(ge=-MAX_FLOAT, le=MAX_FLOAT, description="must be a finite number")]
NonNegative = Annotated[float, Meta(ge=0.0, le=MAX_FLOAT, description="must be a finite number >= 0")]
Positive = Annotated[float, Meta(gt=0.0, le=MAX_FLOAT, description="must be a finite number > 0")]
Count = integer()
Flag = Annotated[bool, Meta(description="must be true or false")]
Digest = Annotated[str, Meta(pattern=r"^[0-9a-f]{16}\Z",
                             description="must be 16 lowercase hex characters (Sensor.digest)")]


def shape_rule(ndim_lo: int, ndim_hi: int, max_dim: int) -> Any:
    dim = Annotated[int, Meta(ge=0, le=max_dim - 1)]
    return Annotated[list[dim], Meta(min_length=ndim_lo, max_length=ndim_hi, description=(
        f"must be a list of {ndim_lo}..{ndim_hi} integers in 0..{max_dim - 1}"))]


# ---- decoding ---------------------------------------------------------------------------------------

def short(value: Any) -> str:
    text_ = repr(value)
    return text_ if len(text_) <= 80 else text_[:77] + "..."


class _ExtRefused(Exception):
    pass


def _refuse_ext(code: int, data: bytes) -> None:
    raise _ExtRefused(code)


def unpack(data: Any, what: str, limit: int, error: ErrorFactory) -> dict:
    """One msgpack map from `data` (bytes-like, at most `limit` bytes), every length bounded."""
    view = memoryview(data)
    if view.nbytes > limit:
        raise error("oversized", f"{what} header is {view.nbytes} bytes; at most {limit} allowed")
    try:
        header = msgpack.unpackb(view, raw=False, use_list=True, strict_map_key=True, max_str_len=limit,
                                 max_bin_len=limit, max_array_len=MAX_ENTRIES, max_map_len=MAX_ENTRIES,
                                 max_ext_len=0, ext_hook=_refuse_ext)
    except _ExtRefused:  # an empty one: max_ext_len=0 refuses all others
        raise error("malformed", f"{what} header holds a msgpack ext type, which is refused") from None
    except ValueError as exc:
        if "max_ext_len" in str(exc):
            raise error("malformed", f"{what} header holds a msgpack ext type, which is refused") from None
        if "exceeds max" in str(exc):
            raise error("oversized", f"{what} header: {exc}") from None
        raise error("malformed", f"{what} header is not one valid msgpack value ({type(exc).__name__}"
                                 f"{': ' + str(exc) if str(exc) else ''})") from None
    except Exception as exc:  # msgpack's FormatError, StackError and friends
        raise error("malformed", f"{what} header is not valid msgpack ({type(exc).__name__})") from None
    if not isinstance(header, dict):
        raise error("malformed", f"{what} header is a msgpack {type(header).__name__}, not a map")
    return header


S = typing.TypeVar("S", bound=Struct)


def validate(header: dict, schema: type[S], what: str, error: ErrorFactory) -> S:
    """The header as `schema`, or error(reason, "<what> header field '<name>' ...") naming the first
    field that breaks its rule."""
    try:
        return msgspec.convert(header, schema)
    except msgspec.ValidationError as exc:
        raise _explain(str(exc), header, schema, what, error) from None


_PATH = re.compile(r"`\$((?:\.\w+|\[[^\]]*\])*)`")
_MISSING = re.compile(r"^Object missing required field `(\w+)`")


def _explain(message: str, header: dict, schema: type[Struct], what: str, error: ErrorFactory) -> Exception:
    """Turn msgspec's "Expected ... - at `$.a.b`" into our message: the field, its value, its rule."""
    m = _PATH.search(message)
    steps = re.findall(r"\.(\w+)|\[(\d+)\]", m.group(1)) if m else []  # (name, "") or ("", index)
    missing = _MISSING.match(message)
    if missing:
        steps.append((missing.group(1), ""))
    value: Any = header
    cls: Any = schema
    label: list[str] = []
    ann: Any = None
    taken = 0
    for name, index in steps:
        if index:  # into a list only where its entries are maps with fields of their own
            entry = _struct_of(_list_entry(ann)) if label else None
            if entry is None or not isinstance(value, list) or int(index) >= len(value):
                break  # inside a list of plain values or a map: the named field above is the one that is wrong
            label[-1] += f"[{index}]"
            value, cls = value[int(index)], entry
            taken += 1
            continue
        hints = _hints(cls) if cls is not None else {}
        if name not in hints:
            break  # inside a list or a map: the named field above is the one that is wrong
        label.append(name)
        ann = hints[name]
        value = value.get(name) if isinstance(value, dict) else None
        cls = _struct_of(ann)
        taken += 1
    if not label:
        return error("malformed", f"{what} header: {message}")
    field = ".".join(label)
    if missing and taken == len(steps):
        return error("malformed", f"{what} header field '{field}' is missing")
    rule = _description(ann) or message.split(" - at ")[0]
    return error(_reason(ann), f"{what} header field '{field}' = {short(value)}: {rule}")


@functools.lru_cache(maxsize=None)
def _hints(cls: type) -> dict:
    return typing.get_type_hints(cls, include_extras=True)


def _metas(tp: Any) -> list:
    return [a for a in typing.get_args(tp)[1:] if isinstance(a, Meta)] if typing.get_origin(tp) is Annotated else []


def _description(tp: Any) -> str:
    for meta in _metas(tp):
        if meta.description:
            return meta.description
    return ""


def _reason(tp: Any) -> str:
    for meta in _metas(tp):
        if meta.extra and "reason" in meta.extra:
            return meta.extra["reason"]
    return "malformed"


def _list_entry(tp: Any) -> Any:
    """The entry type of a list field (through Annotated and Optional), or None."""
    while typing.get_origin(tp) is Annotated:
        tp = typing.get_args(tp)[0]
    for t in (tp, *typing.get_args(tp)):
        if typing.get_origin(t) is list:
            return typing.get_args(t)[0]
    return None


def _struct_of(tp: Any) -> type | None:
    """The Struct a field holds (through Annotated and Optional), or None."""
    while typing.get_origin(tp) is Annotated:
        tp = typing.get_args(tp)[0]
    if isinstance(tp, type) and issubclass(tp, Struct):
        return tp
    structs = [a for a in typing.get_args(tp) if isinstance(a, type) and issubclass(a, Struct)]
    return structs[0] if len(structs) == 1 else None
