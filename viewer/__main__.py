"""`python -m cubecast.viewer --sub ENDPOINT` (the window) or `--snapshot PNG --sub ENDPOINT`, without the daemon.

The daemon's `cubecast view` is the same command with --capture available as well.
"""

from __future__ import annotations

import argparse
import sys

from .cli import register


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(prog="python -m cubecast.viewer")
    sub = p.add_subparsers(dest="command")
    register(sub)
    args = p.parse_args(["view"] + list(sys.argv[1:] if argv is None else argv))
    return int(args.func(args) or 0)


if __name__ == "__main__":
    sys.exit(main())
