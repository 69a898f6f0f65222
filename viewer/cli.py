"""`cubecast view`: the live window, or a PNG snapshot without a display.

    cubecast view --sub tcp://127.0.0.1:5602 [--sensor ID] [--server-key SERVE.key --key VIEWER.key_secret]
    cubecast view --snapshot out.png --capture FILE [--frame N] [--size WxH]
    cubecast view --snapshot out.png --sub ENDPOINT [--wait-s S] [--size WxH]

Importing this module imports neither vispy nor the daemon: `register` only adds arguments. A capture
needs the daemon's chain, so the daemon passes `capture_snapshot` (daemon.viewsource) when it registers.
"""

from __future__ import annotations

import argparse
import logging
import re

log = logging.getLogger(__name__)

DEFAULT_ENDPOINT = "tcp://127.0.0.1:5602"


def _size(text: str) -> tuple[int, int]:
    m = re.fullmatch(r"\s*(\d+)\s*[xX]\s*(\d+)\s*", text)
    if not m:
        raise argparse.ArgumentTypeError(f"--size {text!r}: expected WIDTHxHEIGHT, e.g. 1280x800")
    w, h = int(m.group(1)), int(m.group(2))
    if not (320 <= w <= 8192 and 240 <= h <= 8192):
        raise argparse.ArgumentTypeError(f"--size {text!r}: width 320..8192 and height 240..8192 pixels")
    return w, h


def _nonneg_int(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r}: expected a whole number") from None
    if v < 0:
        raise argparse.ArgumentTypeError(f"{text!r}: must not be negative")
    return v


def _positive_float(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r}: expected a number") from None
    if not v > 0 or v != v or v == float("inf"):
        raise argparse.ArgumentTypeError(f"{text!r}: must be a positive finite number")
    return v


def _height(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r}: expected a number of metres") from None
    if not 0.0 <= v <= 100.0:
        raise argparse.ArgumentTypeError(f"--sensor-height-m {text}: must be within 0..100 m")
    return v


def register(subparsers, capture_snapshot=None) -> argparse.ArgumentParser:
    """Add the `view` subcommand. `capture_snapshot(capture, frame, out_png, size, **options)` renders
    a capture (provided by daemon.viewsource); without it --capture reports that it is unavailable."""
    v = subparsers.add_parser("view", help="live viewer of a daemon's point clouds, or a PNG snapshot",
                              description="Show a daemon's points, range-Doppler map and health in a window, "
                                          "or render one view to a PNG without a display.")
    v.add_argument("--sub", metavar="ENDPOINT", action="append",
                   help=f"the daemon's PUB endpoint (default {DEFAULT_ENDPOINT}); repeat it to subscribe to several "
                        f"daemons at once (one per sensor, for --platform)")
    v.add_argument("--sensor", metavar="ID", help="show only this sensor (default: all, the first one seen "
                                                  "is shown; key n switches)")
    v.add_argument("--snapshot", metavar="PNG", help="render to this PNG file instead of opening a window")
    v.add_argument("--capture", metavar="FILE", action="append",
                   help="with --snapshot: process this capture offline (with --platform, give one per sensor)")
    v.add_argument("--platform", action="store_true",
                   help="draw every sensor on the bus in one picture, in the platform frame of their [pose] "
                        "(key p switches; the map and status stay one sensor's, key n)")
    v.add_argument("--frame", type=_nonneg_int, default=None,
                   help="with --capture: the frame to show (frames 0..N are processed; default the last)")
    v.add_argument("--size", type=_size, default=(1280, 800), metavar="WxH", help="window / image size")
    v.add_argument("--wait-s", type=_positive_float, default=10.0,
                   help="with --snapshot --sub: the longest wait for messages (default 10 s)")
    v.add_argument("--persist", type=_nonneg_int, default=8, metavar="N",
                   help="point clouds kept on screen, fading (default 8; 1 shows only the latest)")
    v.add_argument("--color", choices=("velocity", "snr", "sensor"), default="velocity",
                   help="colour points by (sensor: with --platform)")
    v.add_argument("--velocity-span-mps", type=_positive_float, default=2.5,
                   help="radial velocity at the ends of the colour scale (default 2.5 m/s)")
    v.add_argument("--sensor-height-m", type=_height, default=None,
                   help="sensor height above the ground, for the side view's ground line (default: the "
                        "sensor description's mount_height_m, else 1.0 m)")
    v.add_argument("--stall-s", type=_positive_float, default=3.0,
                   help="seconds without messages before the status shows a stall (default 3)")
    v.add_argument("--frontend", action="store_true",
                   help="show the front end's per-channel panel from the start (key m toggles it)")
    v.add_argument("--settings", help="with --capture: processing settings (TOML)")
    v.add_argument("--control", metavar="ENDPOINT", help="serve's --control endpoint: keys f/F, k/K, g/G, t/T tune "
                                                         "its CFAR live (viewer/tuning.py; the same --server-key/--key)")
    g = v.add_argument_group("keys (CURVE; see `cubecast keys`)")
    g.add_argument("--server-key", metavar="FILE", help="the daemon's public key (its NAME.key), for a daemon that "
                                                        "requires keys (serve --client-keys)")
    g.add_argument("--key", metavar="FILE", help="with --server-key: this viewer's secret key (NAME.key_secret); its "
                                                 "public key must be in the daemon's --client-keys folder")
    v.set_defaults(func=lambda args: run(args, capture_snapshot))
    return v


def _err(msg: str) -> int:
    log.error("cubecast view: error: %s", msg)
    return 2


def run(args, capture_snapshot=None) -> int:
    persist = max(1, args.persist)
    if args.capture and not args.snapshot:
        return _err("--capture renders a snapshot: give --snapshot PNG as well")
    if args.capture and args.sub:
        return _err("give either --capture or --sub, not both")
    if args.frame is not None and not args.capture:
        return _err("--frame applies to --capture only")
    if getattr(args, "control", None) and args.snapshot:
        return _err("--control applies to the live window only, not to --snapshot")
    if args.capture and len(args.capture) > 1 and not args.platform:
        return _err("several --capture files are drawn together in the platform frame: add --platform")
    if args.color == "sensor" and not args.platform:
        return _err("--color sensor applies to --platform only")
    options = dict(persist_frames=persist, color_by=args.color, velocity_span_mps=args.velocity_span_mps,
                   sensor_height_m=args.sensor_height_m, view_frame="platform" if args.platform else "sensor",
                   frontend_panel=bool(getattr(args, "frontend", False)))
    server_key, key = getattr(args, "server_key", None), getattr(args, "key", None)
    if args.capture and (server_key or key):
        return _err("--server-key and --key apply to --sub only")
    from .keyfiles import KeyFileError, load_feed_keys
    try:
        keys = load_feed_keys(server_key, key)
    except KeyFileError as exc:
        return _err(str(exc))

    if args.snapshot:
        from .snapshot import OffscreenUnavailable
        try:
            if args.capture:
                if capture_snapshot is None:
                    return _err("--capture needs the processing chain: run it as `cubecast view`")
                if args.settings:
                    options["settings_path"] = args.settings
                captures = args.capture if len(args.capture) > 1 else args.capture[0]
                info = capture_snapshot(captures, args.frame, args.snapshot, args.size, **options)
                print(f"wrote {args.snapshot}: sensor {info['sensor_id']}, {info['frames']} frames shown, "
                      f"{info['points']} points in the last")
                return 0
            return _snapshot_sub(args, options, keys)
        except OffscreenUnavailable as exc:
            return _err(str(exc))

    if args.settings:
        return _err("--settings applies to --capture only")
    from .app import run_window
    return run_window(args.sub or [DEFAULT_ENDPOINT], sensor=args.sensor, size=args.size,
                      stall_after_s=args.stall_s, keys=keys, control=getattr(args, "control", None), **options)


def _snapshot_sub(args, options, keys=None) -> int:
    from .snapshot import collect_from_sub, make_state, render_state, write_png
    endpoints = args.sub or [DEFAULT_ENDPOINT]
    endpoint = " + ".join(endpoints)
    try:
        msgs, info = collect_from_sub(endpoints, args.sensor, args.wait_s, options["persist_frames"], keys=keys,
                                      every_sensor=options["view_frame"] == "platform" and not args.sensor)
    except Exception as exc:  # a malformed endpoint string, for one
        return _err(f"--sub {endpoint}: {exc}")
    sensor_id = (args.sensor or "").rstrip("/") or None
    state = make_state(msgs, endpoint=endpoint, sensor_id=sensor_id, bad_by_reason=info["bad_by_reason"],
                       idle_s=info["idle_s"] if msgs else 0.0, connected=info["connected"], **options)
    img, vc = render_state(state, args.size, footer=f"snapshot of {endpoint}")
    vc.canvas.close()
    write_png(args.snapshot, img[..., :3])
    n_pts = sum(1 for m in msgs if m["kind"] == "points")
    if not msgs:
        log.warning("cubecast view: no messages from %s within %g s; wrote the waiting screen to %s", endpoint,
                    args.wait_s, args.snapshot)
        return 1
    print(f"wrote {args.snapshot}: {len(msgs)} messages, {n_pts} point clouds from {endpoint}")
    return 0
