"""`cubecast tune`: read or change the processing settings of a running serve through its control
endpoint (serve --control ENDPOINT; the protocol is daemon/control.py).

    cubecast tune --control tcp://127.0.0.1:5605                         # the running settings (TOML)
    cubecast tune --control tcp://127.0.0.1:5605 --set cfar_pfa=1e-5 --set cfar_kind=ca
    cubecast tune --control EP --set cfar_guard_range=2 --get --json

A value is read as a TOML value (1e-5, 8, true, "os"); one that is not TOML is taken as a string, so
cfar_kind=os needs no quotes. serve validates the fields exactly as a settings file. First a `get`
asks whether serve answers at all (within --timeout); a `set` then waits up to
control.SET_TIMEOUT_S, since serve (and every worker) builds the new chain before it answers. The
running settings print as a [processing] section, a settings file as it stands. A refused change is
an error (exit 2) naming serve's reason; with --json the reply is printed first.
"""

from __future__ import annotations

import json
import tomllib

from .control import SET_TIMEOUT_S, request, settings_toml, toml_value
from .errors import CubecastError


def parse_assignment(text: str) -> tuple[str, object]:
    """'NAME=VALUE' -> (NAME, value): VALUE as TOML reads it, else the text itself."""
    name, sep, raw = text.partition("=")
    name, raw = name.strip(), raw.strip()
    if not sep or not name:
        raise CubecastError(f"--set {text!r}: expected NAME=VALUE, e.g. cfar_pfa=1e-5")
    if not raw:
        raise CubecastError(f"--set {text!r}: no value after '='")
    try:
        return name, tomllib.loads(f"v = {raw}")["v"]
    except tomllib.TOMLDecodeError:
        return name, raw


def changes_from(assignments: list[str]) -> dict:
    changes: dict = {}
    for text in assignments:
        name, value = parse_assignment(text)
        if name in changes:
            raise CubecastError(f"--set {name}: given twice")
        changes[name] = value
    return changes


def tune(endpoint: str, changes: dict, *, timeout_s: float = 5.0, keys=None) -> dict:
    """{'before': reply to get, 'after': reply to set or None}; CubecastError when nobody answers."""
    before = request(endpoint, {"op": "get"}, timeout_s, keys)
    after = None
    if changes:
        after = request(endpoint, {"op": "set", "settings": changes}, max(timeout_s, SET_TIMEOUT_S), keys)
    return {"before": before, "after": after}


def format_change(endpoint: str, reply: dict) -> str:
    if not reply["changed"]:
        return f"serve at {endpoint}: no field changed (settings epoch {reply['epoch']})"
    width = max(len(k) for k in reply["changed"])
    lines = [f"serve at {endpoint}: applied, settings epoch {reply['epoch']}"]
    lines += [f"  {k:<{width}}  {toml_value(a)} -> {toml_value(b)}" for k, (a, b) in reply["changed"].items()]
    return "\n".join(lines)


def format_settings(endpoint: str, reply: dict) -> str:
    return (f"# running settings of serve at {endpoint}: epoch {reply['epoch']}, last changed by "
            f"{reply['changed_by']}\n" + settings_toml(reply["settings"]).rstrip("\n"))


def run(args) -> int:
    from .keys import ClientKeys
    if (args.server_key is None) != (args.key is None):
        raise CubecastError("--server-key and --key: give both (serve's public key and this side's secret key) "
                            "or neither")
    if not (args.timeout > 0):
        raise CubecastError(f"--timeout {args.timeout!r}: must be a number of seconds > 0")
    keys = None
    if args.key is not None:
        keys = ClientKeys.from_files(args.server_key, args.key, server_role="--server-key", key_role="--key")
    changes = changes_from(args.set or [])
    out = tune(args.control, changes, timeout_s=args.timeout, keys=keys)
    after = out["after"]
    if args.json:  # a reply always carries the running settings (after the change, when one was applied)
        print(json.dumps(after or out["before"], allow_nan=False))
    if after is not None and not after["ok"]:
        raise CubecastError(f"serve at {args.control} refused the change ({after['reason']}): {after['error']}")
    if not args.json:
        if after is not None:
            print(format_change(args.control, after))
        if after is None or args.get:
            print(format_settings(args.control, after or out["before"]))
    return 0


def add_parser(subparsers):
    """Add the `tune` subcommand to an argparse subparsers object; returns its parser."""
    p = subparsers.add_parser("tune", help="read or change the processing settings of a running serve (its "
                                           "--control endpoint)")
    p.add_argument("--control", required=True, metavar="ENDPOINT", help="serve's --control endpoint")
    p.add_argument("--set", action="append", metavar="NAME=VALUE",
                   help="change a [processing] field (repeatable; all of them at once, or none)")
    p.add_argument("--get", action="store_true", help="print the running settings (the default without --set; "
                                                      "with --set: after the change)")
    p.add_argument("--json", action="store_true", help="print serve's reply as one JSON object")
    p.add_argument("--timeout", type=float, default=5.0, metavar="S",
                   help=f"seconds to wait for serve to answer (default 5; a change waits up to {SET_TIMEOUT_S:g} s "
                        "for the chain to be built)")
    g = p.add_argument_group("keys (CURVE; see `cubecast keys`)")
    g.add_argument("--server-key", metavar="FILE", help="serve's public key (its NAME.key), for a serve with "
                                                       "--control-keys")
    g.add_argument("--key", metavar="FILE", help="with --server-key: this side's secret key (NAME.key_secret); its "
                                                 "public key must be in serve's --control-keys folder")
    p.set_defaults(func=run)
    return p
