"""The `cubecast` command: argparse subcommands, each a thin call into a module.

A command's result (a table, a JSON document) goes to stdout; status lines go through the logging
module to stderr: -v / -q (repeatable) and --log-json, before or after the subcommand, set the level
and the format. Errors a user can cause (CubecastError) print as one line on stderr and exit with code 2, among them an
output path that cannot be written and a malformed endpoint (both checked before the command runs, see
OUTPUT_FLAGS and ENDPOINT_FLAGS). A closed stdout (`cubecast describe --json | head`) ends the command
quietly with code 1; numbers on stdout and stderr never show a negative zero (cliout.py).
"""

from __future__ import annotations

import argparse
import json
import logging
import sys

from . import cliout, logs
from .errors import CubecastError

log = logging.getLogger("cubecast.daemon.cli" if __name__ == "__main__" else __name__)


def _describe(args) -> int:
    from .sensor import load_sensor
    sensor = load_sensor(args.sensor)
    d = sensor.describe()  # plain zeros throughout (sensor.describe), for --json and the text alike
    if args.json:
        print(json.dumps(d, indent=2))
        return 0
    va, lp = d["virtual_array"], d["if_filter"]
    rows = [
        ("sensor", f"{d['sensor_id']}  (digest {d['digest']})"),
        ("wavelength", f"{d['wavelength_m'] * 1e3:.4f} mm at {d['center_frequency_hz'] / 1e9:.3f} GHz "
                       f"(half wavelength {d['half_wavelength_m'] * 1e3:.4f} mm)"),
        ("swept bandwidth in ADC window", f"{d['bandwidth_hz'] / 1e6:.1f} MHz"),
        ("range resolution", f"{d['range_resolution_m']:.4f} m"),
        ("maximum range", f"{d['max_range_m']:.2f} m ({d['range_bins']} range bins)"),
        ("IF low-pass filter", f"Butterworth order {lp['order']}, cutoff {lp['cutoff_hz'] / 1e6:.3f} MHz "
                               f"(range {lp['cutoff_range_m']:.2f} m{'; default' if lp['default'] else ''}), "
                               f"{_plain(lp['loss_at_max_range_db'], 2)} dB loss at the maximum range"),
        ("velocity resolution", f"{d['velocity_resolution_mps']:.4f} m/s"),
        ("unambiguous velocity", f"+-{d['max_velocity_mps']:.3f} m/s ({d['mimo_scheme'].upper()}, "
                                 f"{d['n_tx']} TX); unfolded +-{d['max_velocity_unfolded_mps']:.3f} m/s"),
        ("chirp duty cycle", f"{d['chirp_duty_cycle'] * 100:.1f} %"),
        ("frame duty cycle", f"{d['frame_duty_cycle'] * 100:.2f} % ({d['chirps_per_frame']} chirps, "
                             f"{d['loops_per_frame']} loops, frame period {d['frame_period_s'] * 1e3:.1f} ms)"),
        ("virtual array", f"{va['elements']} elements, {va['unique_elements']} unique, "
                          f"{va['redundant_elements']} redundant; {va['azimuth_columns']} azimuth columns x "
                          f"{va['elevation_rows']} elevation rows"),
        ("apertures", f"azimuth {va['azimuth_aperture_m'] * 1e3:.2f} mm, elevation "
                      f"{va['elevation_aperture_m'] * 1e3:.2f} mm"),
        ("Rayleigh resolution at boresight",
         f"{_deg(va, 'azimuth', 'columns')}; {_deg(va, 'elevation', 'rows')}"),
        ("pose on the platform", _pose_text(d["pose"])),
    ]
    width = max(len(k) for k, _ in rows)
    for k, v in rows:
        print(f"{k:<{width}}  {v}")
    print("virtual element positions [x, z] in half wavelengths:")
    print("  " + " ".join(f"[{_plain(p[0])},{_plain(p[2])}]" for p in va["positions_half_wavelength"]))
    return 0


def _pose_text(pose: dict) -> str:
    if not pose["given"]:
        return "none ([pose]): the platform frame is the sensor frame"
    x, y, z = (_plain(v, 3) for v in pose["position_m"])
    return (f"at [{x}, {y}, {z}] m, yaw {_plain(pose['yaw_deg'], 2)} deg, pitch {_plain(pose['pitch_deg'], 2)} deg, "
            f"roll {_plain(pose['roll_deg'], 2)} deg")


def _plain(x: float, digits: int | None = None) -> str:
    """x as %g (or with `digits` decimals), never a negative zero: rounded first, then + 0.0."""
    if digits is None:
        return f"{round(x, 6) + 0.0:g}"
    return f"{round(x, digits) + 0.0:.{digits}f}"


def _deg(va: dict, axis: str, lines: str) -> str:
    """A Rayleigh resolution, or why there is none: one row (column), or an aperture too small to
    resolve two sources (lambda / L >= 1 in sine space), which still measures the angle."""
    v = va[f"{axis}_resolution_deg"]
    if v is not None:
        return f"{axis} {v:.2f} deg"
    count = va[f"{axis}_{lines}"]
    if count < 2:
        return f"{axis}: no {axis} aperture (one {lines[:-1]})"
    return (f"{axis}: no {axis} aperture that resolves ({count} {lines} over "
            f"{va[f'{axis}_aperture_m'] * 1e3:.2f} mm: measured, not resolved)")


def _simulate(args) -> int:
    from .scene import load_scene
    from .sensor import load_sensor
    sensor = load_sensor(args.sensor)
    scene = load_scene(args.scene)
    if args.out is None and args.pub is None:
        raise CubecastError("simulate: give --out CAPTURE or --pub ENDPOINT")
    if args.pub is None and (args.server_key or args.client_keys or args.insecure):
        raise CubecastError("--server-key, --client-keys and --insecure: only with --pub")
    if args.out:
        from .files import simulate_capture
        simulate_capture(sensor, scene, args.out, args.frames, args.seed, quantize=not args.no_quantize,
                         progress=logs.show_progress())
        log.info("wrote %d frames of '%s' to %s", args.frames, scene.name, args.out)
        return 0
    from .sources import publish_simulation, publisher_keys
    return publish_simulation(sensor, scene, args.pub, frames=args.frames_live, seed=args.seed,
                              keys=publisher_keys(args.server_key, args.client_keys), insecure=args.insecure)


def _process(args) -> int:
    from .process import process_capture
    return process_capture(args.capture, args.out, fmt=args.format, settings_path=args.settings,
                           calibration_path=args.calibration, progress=logs.show_progress(),
                           skip_corrupt=args.skip_corrupt, frontend_out=args.frontend_out)


def _serve(args) -> int:
    from .netio import DEFAULT_SUB
    from .service import serve
    if (args.tasks is None) != (args.results is None):
        raise CubecastError("--tasks and --results: give both endpoints for workers, or neither")
    if args.worker_keys is not None and not (args.workers or args.tasks is not None):
        raise CubecastError("--worker-keys: only with --workers or --tasks")
    return serve(args.sensor, args.sub or [DEFAULT_SUB], args.pub, settings_path=args.settings,
                 calibration_path=args.calibration, queue_depth=args.queue, rdmap_max_hz=args.rdmap_rate,
                 workers=args.workers, tasks=args.tasks, results=args.results,
                 task_timeout_s=args.task_timeout, server_key=args.server_key, worker_keys=args.worker_keys,
                 client_keys=args.client_keys, source_keys=args.source_key, insecure=args.insecure,
                 watch_settings=args.watch_settings, control=args.control, control_keys=args.control_keys)


def _worker(args) -> int:
    from .worker import run_worker
    if (args.server_key is None) != (args.key is None):
        raise CubecastError("--server-key and --key: give both (serve's public key and this worker's secret "
                            "key) or neither")
    return run_worker(args.connect, args.results, sensor_path=args.sensor, name=args.name,
                      capacity=args.capacity, check_crc=not args.skip_crc,
                      server_key=args.server_key, key=args.key)


def _keys(args) -> int:
    from .keys import create_keys
    public, secret = create_keys(args.name, args.dir)
    log.info("wrote %s (public: give it to the other side) and %s (secret: keep it on this host)", public, secret)
    return 0


def _replay(args) -> int:
    from .sources import replay
    return replay(args.capture, args.pub, speed=args.speed, loop=args.loop, frames=args.frames,
                  wait_s=args.wait_subscriber, server_key=args.server_key, client_keys=args.client_keys,
                  insecure=args.insecure)


def _record(args) -> int:
    from .sources import record
    return record(args.sub, args.out, args.points_out, points_format=args.points_format, frames=args.frames,
                  duration_s=args.duration, sensor_path=args.sensor, server_keys=args.server_key, key=args.key,
                  progress=logs.show_progress(), frontend_out=args.frontend_out)


def _with_publisher_security(func):
    """A command whose source publisher is made inside it (the adapter): its --server-key, --client-keys
    and --insecure reach the publisher through netio.publisher_security."""
    def run(args) -> int:
        from .netio import publisher_security
        from .sources import publisher_keys
        with publisher_security(publisher_keys(args.server_key, args.client_keys), args.insecure):
            return func(args)
    return run


# the key options, the same names on every subcommand: the side that binds gives its own secret key
# (--server-key) and a folder of the public keys it accepts; the side that connects gives the bound
# side's public key (--server-key; serve: --source-key) and its own secret key (--key; serve: its
# --server-key)
INSECURE_HELP = ("allow binding an address other hosts can reach without keys (the log says what it exposes); "
                 "without keys only loopback, ipc and inproc endpoints are bound")


def _add_publisher_key_options(p: argparse.ArgumentParser, what: str = "this source") -> None:
    g = p.add_argument_group("keys (CURVE; see `cubecast keys`)")
    g.add_argument("--server-key", metavar="FILE",
                   help=f"require keys of subscribers: {what}'s secret key (NAME.key_secret from `cubecast keys`)")
    g.add_argument("--client-keys", metavar="DIR",
                   help="with --server-key: folder of the public keys (*.key) of the subscribers accepted (a key "
                        "added later is accepted without a restart)")
    g.add_argument("--insecure", action="store_true", help=INSECURE_HELP)


def _add_client_key_options(p: argparse.ArgumentParser, bound_side: str, repeatable: bool = False) -> None:
    g = p.add_argument_group("keys (CURVE; see `cubecast keys`)")
    more = "; repeatable: one for every --sub, or one per --sub in the same order" if repeatable else ""
    g.add_argument("--server-key", metavar="FILE", action="append" if repeatable else "store",
                   help=f"the public key (NAME.key) of {bound_side}, when it requires keys{more}")
    g.add_argument("--key", metavar="FILE", help="with --server-key: this side's secret key (NAME.key_secret); its "
                                                 "public key must be in the other side's --client-keys folder")


def _demo(args) -> int:
    from .demo import run_demo
    return run_demo(args.capture, seconds=args.seconds, viewer=not args.no_viewer)


def _bench(args) -> int:
    from . import bench
    if args.resolution:
        from . import resolution
        for flag, value in (("--frames", args.frames), ("--sensor", args.sensor), ("--workers", args.workers),
                            ("--accuracy", args.accuracy or None)):
            if value is not None:
                raise CubecastError(f"{flag}: not with --resolution, which runs the angle stage alone")
        trials = resolution.TRIALS if args.trials is None else args.trials
        result = resolution.run_resolution(trials, 0 if args.seed is None else args.seed)
        printer = resolution.print_resolution_table
    elif args.accuracy:
        for flag, value in (("--frames", args.frames), ("--sensor", args.sensor), ("--workers", args.workers)):
            if value is not None:
                raise CubecastError(f"{flag}: not with --accuracy, which runs the reference sensor and the bundled "
                                    f"yard sensor")
        trials = bench.ACCURACY_TRIALS if args.trials is None else args.trials
        result = bench.run_accuracy(trials, 0 if args.seed is None else args.seed, progress=logs.show_progress())
        printer = bench.print_accuracy_table
    else:
        for flag, value in (("--trials", args.trials), ("--seed", args.seed)):
            if value is not None:
                raise CubecastError(f"{flag}: only with --accuracy or --resolution")
        frames = 60 if args.frames is None else args.frames
        if frames < 50:
            raise CubecastError(f"--frames {frames}: the medians need at least 50 frames")
        result = bench.run(args.sensor or ["reference", "large"], frames, 2 if args.workers is None else args.workers)
        printer = bench.print_table
    if args.json:
        print(json.dumps(result))
    else:
        printer(result)
    return 0


def _add_file_commands(sub) -> None:
    """describe, simulate, process: files in, files or text out."""
    d = sub.add_parser("describe", help="print a sensor's derived figures")
    d.add_argument("sensor", help="sensor description (TOML)")
    d.add_argument("--json", action="store_true", help="print one JSON object")
    d.set_defaults(func=_describe)

    s = sub.add_parser("simulate", help="simulate a scene: to a capture file, or live over ZeroMQ")
    s.add_argument("scene", help="scene description (TOML)")
    s.add_argument("--sensor", required=True, help="sensor description (TOML)")
    s.add_argument("--out", help="write a capture file")
    s.add_argument("--pub", help="publish ADC frames live at the frame period on this ZeroMQ endpoint")
    s.add_argument("--frames", type=int, default=20, help="frames to write with --out (default 20)")
    s.add_argument("--frames-live", type=int, default=0, help="with --pub: stop after N frames (0 = run until stopped)")
    s.add_argument("--seed", type=int, default=0, help="seed of the noise (default 0); the same seed gives the same "
                                                       "frames")
    s.add_argument("--no-quantize", action="store_true", help="store canonical complex64 instead of the ADC format")
    _add_publisher_key_options(s, "the simulator")
    s.set_defaults(func=_simulate)

    pr = sub.add_parser("process", help="process a capture offline into a point-cloud file")
    pr.add_argument("capture", help="capture file (from simulate, record or the adapter)")
    pr.add_argument("--out", required=True, help="point file (.csv, .npz, .mcap) or, with --format pcd, ply or "
                                                 "rosbag, a new folder")
    pr.add_argument("--format", default=None, metavar="{csv,npz,pcd,ply,mcap,rosbag}",
                    help="default: from the file name (pcd, ply, mcap, rosbag need cubecast[export])")
    pr.add_argument("--settings", help="processing settings (TOML, [processing] section)")
    pr.add_argument("--calibration", help="calibration file (TOML)")
    pr.add_argument("--skip-corrupt", action="store_true",
                    help="skip frames whose CRC fails (each is reported); default: stop with an error")
    pr.add_argument("--frontend-out", metavar="FILE.csv",
                    help="the front end's monitor (clipping, interference, floor, DC, IRR, warnings), a CSV row per "
                         "frame and receive channel")
    pr.set_defaults(func=_process)


def _inspect(args) -> int:
    from .capture import CaptureReader
    from .files import capture_sensor, to_canonical
    from .inspect import format_inspection, inspect_cell
    from .process import make_pipeline
    from .settings import load_settings
    with CaptureReader(args.capture) as reader:
        if not 0 <= args.frame < len(reader):
            raise CubecastError(f"--frame {args.frame}: {args.capture} holds frames 0..{len(reader) - 1}"
                                if len(reader) else f"--frame {args.frame}: {args.capture} holds no frames")
        sensor = capture_sensor(reader)
        f = reader.read(args.frame)
        frame = to_canonical(sensor, f.payload).copy()
    pipe = make_pipeline(sensor, load_settings(args.settings) if args.settings else None, args.calibration)
    result = {"capture": str(args.capture), "frame": args.frame, "sequence": f.sequence,
              "timestamp_s": f.timestamp_s} | inspect_cell(pipe, frame, args.range_m, args.velocity_mps)
    if args.png:
        try:
            from ..viewer.inspectfig import render_inspection
            from ..viewer.snapshot import OffscreenUnavailable
        except ImportError as exc:
            raise CubecastError(f"--png needs the viewer ({exc}); install with: pip install -e '.[viewer]'") from None
        try:
            render_inspection(result, args.png)
        except OffscreenUnavailable as exc:
            raise CubecastError(f"--png {args.png}: {exc}") from None
        log.info("wrote %s", args.png)
    print(json.dumps(result, allow_nan=False) if args.json else format_inspection(result))
    return 0


def _add_inspect(sub) -> None:
    i = sub.add_parser("inspect", help="one range-Doppler cell of one frame of a capture: its numbers, spectra and "
                                       "channels (text, --json, --png)")
    i.add_argument("capture", help="capture file")
    i.add_argument("--frame", type=int, required=True, metavar="N", help="frame index in the capture (0-based)")
    i.add_argument("--range-m", type=float, required=True, metavar="R", help="range of the cell (m)")
    i.add_argument("--velocity-mps", type=float, required=True, metavar="V",
                   help="radial velocity of the cell (m/s, positive receding; beyond the map's span it is unfolded)")
    i.add_argument("--json", action="store_true", help="print everything as one JSON object")
    i.add_argument("--png", metavar="FILE", help="render the cell's figure to this PNG (offscreen, needs the viewer)")
    i.add_argument("--settings", help="processing settings (TOML, [processing] section)")
    i.add_argument("--calibration", help="calibration file (TOML)")
    i.set_defaults(func=_inspect)


def _add_serve(sub) -> None:
    sv = sub.add_parser("serve", help="the streaming daemon: ADC frames in over ZeroMQ, point clouds out")
    sv.add_argument("--sensor", required=True, help="sensor description (TOML) of the source")
    sv.add_argument("--settings", help="processing settings (TOML, [processing] section)")
    sv.add_argument("--watch-settings", action="store_true",
                    help="live tuning: apply the --settings file again whenever it changes, at the next frame "
                         "(a file that does not validate is refused and logged)")
    sv.add_argument("--control", metavar="ENDPOINT",
                    help="live tuning: bind a control endpoint, e.g. tcp://127.0.0.1:5605, for `cubecast tune` and "
                         "the viewer's keys (loopback only unless --control-keys)")
    sv.add_argument("--calibration", help="calibration file (TOML)")
    sv.add_argument("--sub", action="append", metavar="ENDPOINT",
                    help="source endpoint to connect to (repeatable; default tcp://127.0.0.1:5601)")
    sv.add_argument("--pub", default="tcp://127.0.0.1:5602", metavar="ENDPOINT",
                    help="endpoint to bind for points, rdmap, sensor and health (default tcp://127.0.0.1:5602)")
    sv.add_argument("--queue", type=int, default=2, metavar="N",
                    help="frames waiting for processing; when full the oldest is dropped (default 2)")
    sv.add_argument("--rdmap-rate", type=float, default=5.0, metavar="HZ",
                    help="range-Doppler maps per second at most (default 5, 0 = none)")
    sv.add_argument("--workers", type=int, default=0, metavar="N",
                    help="process frames in N local worker processes (default 0: in serve itself)")
    sv.add_argument("--tasks", metavar="ENDPOINT",
                    help="bind this endpoint for workers to fetch frames from, e.g. tcp://0.0.0.0:5603 so that "
                         "`cubecast worker` on other hosts can join (with --results; default with --workers: "
                         "a free loopback port)")
    sv.add_argument("--results", metavar="ENDPOINT", help="bind this endpoint for worker results (with --tasks)")
    sv.add_argument("--task-timeout", type=float, default=None, metavar="S",
                    help="with workers: a frame not answered within S seconds is counted lost (default 2)")
    g = sv.add_argument_group("keys (CURVE; see `cubecast keys`)")
    g.add_argument("--server-key", metavar="FILE",
                   help="serve's secret key (NAME.key_secret from `cubecast keys`), for each of --worker-keys, "
                        "--client-keys and --source-key")
    g.add_argument("--worker-keys", metavar="DIR",
                   help="with workers: require keys; folder of the public keys (*.key) of the workers accepted")
    g.add_argument("--client-keys", metavar="DIR",
                   help="require keys on --pub: folder of the public keys (*.key) of the subscribers accepted "
                        "(viewers, recorders, trackers; a key added later is accepted without a restart)")
    g.add_argument("--control-keys", metavar="DIR",
                   help="require keys on --control: folder of the public keys (*.key) of the clients accepted "
                        "(tune, viewers)")
    g.add_argument("--source-key", metavar="FILE", action="append",
                   help="the source's public key (its NAME.key), for a source that requires keys (its --client-keys "
                        "folder must hold serve's public key); one for every --sub, or one per --sub in order")
    g.add_argument("--insecure", action="store_true", help=INSECURE_HELP)
    sv.set_defaults(func=_serve)


def _add_worker_commands(sub) -> None:
    """worker and keys: scale-out of serve."""
    wk = sub.add_parser("worker", help="process frames for a serve on this or another host")
    wk.add_argument("--connect", required=True, metavar="ENDPOINT", help="serve's --tasks endpoint")
    wk.add_argument("--results", required=True, metavar="ENDPOINT", help="serve's --results endpoint")
    wk.add_argument("--sensor", help="sensor description (TOML) this worker expects; serve refuses the worker "
                                     "if its own differs (default: take serve's)")
    wk.add_argument("--name", help="name shown in serve's health (default HOST-PID)")
    wk.add_argument("--capacity", type=int, default=2, metavar="N",
                    help="frames this worker may hold at once, one processed and the rest waiting (default 2)")
    wk.add_argument("--skip-crc", action="store_true",
                    help="do not re-check each frame's CRC-32 (serve checked it on receipt); for a trusted link")
    wk.add_argument("--server-key", metavar="FILE", help="serve's public key (its NAME.key), for a serve that "
                                                         "requires keys")
    wk.add_argument("--key", metavar="FILE", help="with --server-key: this worker's secret key (NAME.key_secret)")
    wk.set_defaults(func=_worker)

    ky = sub.add_parser("keys", help="make a key pair for an endpoint (--server-key, --key; public keys go into "
                                     "the other side's --client-keys or --worker-keys folder)")
    ky.add_argument("name", help="file name stem: writes NAME.key (public) and NAME.key_secret (secret)")
    ky.add_argument("--dir", default=".", help="folder to write them to (default: the current one)")
    ky.set_defaults(func=_keys)


def _add_stream_commands(sub) -> None:
    """replay, record, demo: sources and sinks of the streams."""
    rp = sub.add_parser("replay", help="publish a capture's ADC frames over ZeroMQ with their recorded timing")
    rp.add_argument("capture", help="capture file to publish")
    rp.add_argument("--pub", default="tcp://127.0.0.1:5601", metavar="ENDPOINT",
                    help="endpoint to bind (default tcp://127.0.0.1:5601)")
    rp.add_argument("--speed", default="1", help="factor of recorded time, or 'max' (default 1)")
    rp.add_argument("--loop", action="store_true", help="start over at the end (sequence numbers keep counting)")
    rp.add_argument("--frames", type=int, default=0, metavar="N", help="stop after N frames (default: all)")
    rp.add_argument("--wait-subscriber", type=float, default=1.0, metavar="S",
                    help="after binding, wait up to S seconds for a subscriber before sending (default 1)")
    _add_publisher_key_options(rp)
    rp.set_defaults(func=_replay)

    rc = sub.add_parser("record", help="record ADC frames to a capture and/or point clouds to a point file from ZeroMQ")
    rc.add_argument("--sub", action="append", metavar="ENDPOINT",
                    help="endpoint to connect to (repeatable: a source for ADC frames, the daemon for points "
                         "and the sensor description; default tcp://127.0.0.1:5602)")
    rc.add_argument("--out", help="capture file for the ADC frames")
    rc.add_argument("--points-out", help="point file for the point clouds (.csv, .npz, .mcap) or, with "
                                         "--points-format pcd, ply or rosbag, a new folder")
    rc.add_argument("--points-format", default=None, metavar="{csv,npz,pcd,ply,mcap,rosbag}",
                    help="format of --points-out; default: from the file name")
    rc.add_argument("--frames", type=int, default=0, metavar="N",
                    help="stop after N ADC frames (N point clouds without --out; N frames of front-end monitors with --frontend-out alone); default: no limit")
    rc.add_argument("--duration", type=float, default=0.0, metavar="S", help="stop after S seconds")
    rc.add_argument("--sensor", help="sensor description (TOML), if no daemon's description is received")
    rc.add_argument("--frontend-out", metavar="FILE.csv",
                    help="serve's front-end monitors, a CSV row per frame and receive channel (as process writes it)")
    _add_client_key_options(rc, "the endpoint's bound side (a source's or serve's)", repeatable=True)
    rc.set_defaults(func=_record)

    dm = sub.add_parser("demo", help="replay the bundled sample through the daemon and report once a second")
    dm.add_argument("--seconds", type=float, default=0.0, metavar="S",
                    help="stop S seconds after the daemon's first report (default: until Ctrl-C)")
    dm.add_argument("--no-viewer", action="store_true", help="do not start the viewer even with a display")
    dm.add_argument("--capture", help="capture to replay instead of replay_samples/yard.cap")
    dm.set_defaults(func=_demo)


def _add_bench(sub) -> None:
    b = sub.add_parser("bench", help="benchmark the chain on simulated frames: speed against the FFT floor, or "
                                     "accuracy against the Cramer-Rao bounds (--accuracy)")
    b.add_argument("--json", action="store_true", help="print one JSON object")
    b.add_argument("--frames", type=int, help="frames measured per sensor after warm-up (>= 50; default 60)")
    b.add_argument("--sensor", action="append", choices=("reference", "large"),
                   help="only this sensor (repeatable; default both)")
    b.add_argument("--workers", type=int,
                   help="also run the large sensor through serve --workers N (0 = skip; default 2)")
    b.add_argument("--accuracy", action="store_true",
                   help="instead of speed: Monte Carlo RMSE against the Cramer-Rao bounds and the reported sigmas "
                        "at integrated SNR 10 to 50 dB (reference and bundled yard sensor)")
    b.add_argument("--resolution", action="store_true",
                   help="instead of speed: how often the angle stage resolves two or three sources in one cell, "
                        "against separation and SNR (8- and 16-element arrays and the bundled one)")
    b.add_argument("--trials", type=int, help="with --accuracy: random targets per SNR and sensor (default 400); "
                                              "with --resolution: trials per cell of the table (default 200)")
    b.add_argument("--seed", type=int, help="with --accuracy or --resolution: seed of the targets and the noise "
                                            "(default 0)")
    b.set_defaults(func=_bench)


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version
    try:
        return version("cubecast")
    except PackageNotFoundError:
        return "unknown (not installed: pip install -e .)"


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="cubecast", description="FMCW MIMO radar processing chain: ADC frames in, "
                                "point clouds out.")
    p.add_argument("--version", action="version", version=f"cubecast {_version()}",
                   help="print the installed cubecast version and exit")
    _add_log_options(p)
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")
    for add in (_add_file_commands, _add_inspect, _add_serve, _add_worker_commands, _add_stream_commands, _add_bench):
        add(sub)
    from .calibrate import add_parser as add_calibrate
    add_calibrate(sub)
    from .info import add_parser as add_info
    add_info(sub)
    from .bridge import add_parser as add_bridge
    add_bridge(sub)
    from .tune import add_parser as add_tune
    add_tune(sub)
    from .batch import add_parser as add_batch
    add_batch(sub)
    from .adapter import add_parser as add_adapter
    ap = add_adapter(sub)
    _add_publisher_key_options(ap, "the adapter")
    ap.set_defaults(func=_with_publisher_security(ap.get_default("func")))
    try:  # the viewer is an optional extra; without vispy, `view` explains what to install
        from .viewsource import register_view
        register_view(sub)
    except ImportError as exc:  # pragma: no cover - only without the viewer package
        v = sub.add_parser("view", help="live viewer (needs the viewer extra)")
        v.set_defaults(func=lambda args, exc=exc: _missing_viewer(exc))
    purpose = {a.dest: a.help for a in sub._choices_actions}
    for name, sp in sub.choices.items():
        _add_log_options(sp, SUBCOMMAND_LOG_SUFFIX)
        if not sp.description:  # `cubecast NAME -h` starts with the purpose shown in `cubecast -h`
            sp.description = purpose.get(name)
    return p


# flags naming a file a command writes (FOLDER_FLAGS: a folder), and the ZeroMQ endpoint flags each
# command binds (True) or connects (False): checked before the command runs, so that a typo costs no
# processing and ZeroMQ never sees a port it would wrap
OUTPUT_FLAGS = ("--out", "--points-out", "--png", "--save-datagrams", "--snapshot", "--frontend-out")
FOLDER_FLAGS = ("--dir",)
FOLDER_OUTPUTS = {("batch", "--out")}  # a command's output flag that names a folder
POINT_FILE_FLAGS = {("process", "--out"): "format", ("record", "--points-out"): "points_format"}  # exports.py
ENDPOINT_FLAGS = {
    "simulate": {"--pub": True}, "replay": {"--pub": True}, "adapter": {"--pub": True},
    "serve": {"--sub": False, "--pub": True, "--tasks": True, "--results": True, "--control": True},
    "worker": {"--connect": False, "--results": False},
    "bridge": {"--sub": False},
    "record": {"--sub": False}, "view": {"--sub": False, "--control": False}, "tune": {"--control": False},
}


def subcommands(parser: argparse.ArgumentParser) -> dict[str, argparse.ArgumentParser]:
    """The subcommand parsers of build_parser(), by name."""
    return next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction)).choices


def check_flags(parser: argparse.ArgumentParser, args: argparse.Namespace) -> dict[str, str]:
    """Check the output paths and endpoints of a parsed command line (CubecastError naming the flag and
    the value); returns {output path: its flag}."""
    from .netio import check_endpoint
    outputs = {}
    endpoints = ENDPOINT_FLAGS.get(args.command, {})
    for action in subcommands(parser)[args.command]._actions:
        flag = next((f for f in action.option_strings if f.startswith("--")), None)
        value = getattr(args, action.dest, None)
        if flag is None or value is None or isinstance(value, bool):
            continue
        for v in value if isinstance(value, list) else [value]:
            if (args.command, flag) in POINT_FILE_FLAGS:
                from .exports import check_target
                check_target(flag, str(v), getattr(args, POINT_FILE_FLAGS[args.command, flag]))
                outputs[str(v)] = flag
            elif flag in OUTPUT_FLAGS or flag in FOLDER_FLAGS:
                cliout.check_output_path(flag, str(v), folder=flag in FOLDER_FLAGS
                                         or (args.command, flag) in FOLDER_OUTPUTS)
                outputs[str(v)] = flag
            if flag in endpoints:
                check_endpoint(v, flag, bind=endpoints[flag])
    return outputs


SUBCOMMAND_LOG_SUFFIX = "_sub"
_LOG_OPTIONS = (
    (("-v", "--verbose"), "log_verbose", dict(action="count", help="more log lines (-v: debug)")),
    (("-q", "--quiet"), "log_quiet", dict(action="count", help="fewer log lines (-q: warnings and errors only, "
                                                               "-qq: errors only)")),
    (("--log-json",), "log_json", dict(action="store_true", help="log lines as JSON objects, one per line")),
)


def _add_log_options(parser: argparse.ArgumentParser, suffix: str = "") -> None:
    """-v / -q / --log-json on the top-level parser (suffix "") or, with defaults suppressed, on a
    subcommand (suffix "_sub"), where they add to the top-level ones. An option whose name the
    subcommand already uses for itself is left to it (there, only the top-level one sets the level)."""
    group = parser.add_argument_group("logging")
    for flags, dest, kw in _LOG_OPTIONS:
        default = argparse.SUPPRESS if suffix else (False if kw["action"] == "store_true" else 0)
        try:
            group.add_argument(*flags, dest=dest + suffix, default=default, **kw)
        except argparse.ArgumentError:
            pass


def log_level_and_json(args: argparse.Namespace) -> tuple[int, bool]:
    """The logging level and format the parsed command line asks for."""
    s = SUBCOMMAND_LOG_SUFFIX
    verbose = args.log_verbose + getattr(args, "log_verbose" + s, 0)
    quiet = args.log_quiet + getattr(args, "log_quiet" + s, 0)
    return logs.level_for(verbose, quiet), bool(args.log_json or getattr(args, "log_json" + s, False))


def _missing_viewer(exc) -> int:
    raise CubecastError(f"the viewer is not available ({exc}); install with: pip install -e '.[viewer]'")


def main(argv: list[str] | None = None) -> int:
    streams = sys.stdout, sys.stderr
    sys.stdout, sys.stderr = (cliout.PlainZeroStream(s) for s in streams)
    try:
        return _run(argv)
    except BrokenPipeError:  # the reader of stdout went away (`| head`): no traceback
        sys.stdout, sys.stderr = streams
        return cliout.quiet_on_closed_stdout()
    finally:
        sys.stdout, sys.stderr = streams


def _run(argv: list[str] | None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    logs.configure(*log_level_and_json(args))
    outputs: dict[str, str] = {}
    try:
        outputs = check_flags(parser, args)
        code = int(args.func(args) or 0)
        sys.stdout.flush()  # a closed stdout shows here, inside main, not at the interpreter's exit
        return code
    except CubecastError as exc:
        print(f"cubecast {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:  # an output that failed after the check (a full disk, a folder removed meanwhile)
        if isinstance(exc, BrokenPipeError) or exc.filename is None or str(exc.filename) not in outputs:
            raise
        print(f"cubecast {args.command}: error: {outputs[str(exc.filename)]} {exc.filename}: cannot write: "
              f"{exc.strerror or exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
