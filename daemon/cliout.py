"""The command line's output edges: printed numbers without a negative zero, output paths checked
before a command runs, and a standard output that may be closed under it (`cubecast ... | head`).

Nothing here knows a subcommand; cli.py names the flags.
"""

from __future__ import annotations

import os
import re
import sys
from pathlib import Path

from .errors import CubecastError

# a zero with a minus sign as str.format, repr and json write it: -0, -0.0, -0.000, -0e+00, -0.00E-05.
# Not inside a word or a number (yard-0, 2024-01-05, 1e-05, -0.05 and -10 are left alone); "+-" (a span
# written +-x) is left alone too
_NEGATIVE_ZERO = re.compile(r"(?<![\w.+-])-(?=0+(?:\.0*)?(?:[eE][+-]?\d+)?(?![\w.]))")
_IN_COLUMN = re.compile(r"(?<=  )-$")


def no_negative_zero(text: str) -> str:
    """`text` with every printed negative zero written as zero ("-0.00 deg" -> "0.00 deg"): a value
    that rounds to zero at the printed precision, or IEEE 754's -0.0, is shown as 0 (Python writes
    the sign; PEP 682, 2022, gives format specs a "z" option for the same reason). In a padded column
    (two spaces or more before it) the sign becomes a space, so the column keeps its width."""
    return _NEGATIVE_ZERO.sub(lambda m: " " if _IN_COLUMN.search(text, 0, m.end()) else "", text)


class PlainZeroStream:
    """A text stream writing through `no_negative_zero` to `stream` (every command's standard output and
    standard error while it runs: results, log lines, progress bars). Whole strings are rewritten, so a
    number split across two write calls would not be: print, logging and json.dumps write each whole."""

    def __init__(self, stream):
        self._stream = stream

    def write(self, text: str) -> int:
        self._stream.write(no_negative_zero(text))
        return len(text)

    def writelines(self, lines) -> None:
        for line in lines:
            self.write(line)

    def __getattr__(self, name):  # flush, fileno, isatty, encoding, buffer, ...
        return getattr(self._stream, name)


def check_output_path(flag: str, path: str, folder: bool = False) -> None:
    """CubecastError "FLAG PATH: cannot write: why" unless `path` can be written (a file in an existing,
    writable folder; with `folder`, a folder that exists or can be made, under a writable one)."""
    p = Path(path)

    def fail(why: str) -> CubecastError:
        return CubecastError(f"{flag} {path}: cannot write: {why}")

    if folder:
        if p.exists() and not p.is_dir():
            raise fail("it is a file, not a folder")
        while not p.exists() and p != p.parent:
            p = p.parent
        if not p.is_dir():
            raise fail(f"{p} is a file, not a folder")
        if not os.access(p, os.W_OK | os.X_OK):
            raise fail(f"no permission to write in {p}")
        return
    if str(path) in ("", "."):
        raise fail("no file name")
    if p.is_dir():
        raise fail("it is a folder; give a file name")
    parent = p.parent
    if not parent.exists():
        raise fail(f"folder {parent} does not exist")
    if not parent.is_dir():
        raise fail(f"{parent} is not a folder")
    if p.exists() and not os.access(p, os.W_OK):
        raise fail("no permission to overwrite it")
    if not p.exists() and not os.access(parent, os.W_OK | os.X_OK):
        raise fail(f"no permission to write in {parent}")


def quiet_on_closed_stdout() -> int:
    """After BrokenPipeError on standard output (the reader went away, as `head` does): point the
    descriptor at /dev/null so that the interpreter's final flush does not fail again, and return the
    exit status 1 (the recipe of the Python documentation, signal module, "Note on SIGPIPE")."""
    devnull = os.open(os.devnull, os.O_WRONLY)
    try:
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError, AttributeError):
        pass  # a stdout without a descriptor (a test's capture): nothing will flush it
    finally:
        os.close(devnull)
    return 1
