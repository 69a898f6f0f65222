"""The `cubecast` command: argparse subcommands, each a thin call into a module.

Errors a user can cause (CubecastError) print as one line on stderr and exit with code 2.
"""

from __future__ import annotations

import argparse
import json
import sys

from .errors import CubecastError


def _describe(args) -> int:
    from .sensor import load_sensor
    sensor = load_sensor(args.sensor)
    d = sensor.describe()
    if args.json:
        print(json.dumps(d, indent=2))
        return 0
    va = d["virtual_array"]
    rows = [
        ("sensor", f"{d['sensor_id']}  (digest {d['digest']})"),
        ("wavelength", f"{d['wavelength_m'] * 1e3:.4f} mm at {d['center_frequency_hz'] / 1e9:.3f} GHz "
                       f"(half wavelength {d['half_wavelength_m'] * 1e3:.4f} mm)"),
        ("swept bandwidth in ADC window", f"{d['bandwidth_hz'] / 1e6:.1f} MHz"),
        ("range resolution", f"{d['range_resolution_m']:.4f} m"),
        ("maximum range", f"{d['max_range_m']:.2f} m ({d['range_bins']} range bins)"),
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
         f"azimuth {_deg(va['azimuth_resolution_deg'])}, elevation {_deg(va['elevation_resolution_deg'])}"),
    ]
    width = max(len(k) for k, _ in rows)
    for k, v in rows:
        print(f"{k:<{width}}  {v}")
    print("virtual element positions [x, z] in half wavelengths:")
    print("  " + " ".join(f"[{p[0]:g},{p[2]:g}]" for p in va["positions_half_wavelength"]))
    return 0


def _deg(v) -> str:
    return "none (one row)" if v is None else f"{v:.2f} deg"


def _simulate(args) -> int:
    from .scene import load_scene
    from .sensor import load_sensor
    sensor = load_sensor(args.sensor)
    scene = load_scene(args.scene)
    if args.out is None and args.pub is None:
        raise CubecastError("simulate: give --out CAPTURE or --pub ENDPOINT")
    if args.out:
        from .files import simulate_capture
        simulate_capture(sensor, scene, args.out, args.frames, args.seed, quantize=not args.no_quantize,
                         progress=not args.quiet)
        if not args.quiet:
            print(f"wrote {args.frames} frames of '{scene.name}' to {args.out}")
        return 0
    from .sources import publish_simulation
    return publish_simulation(sensor, scene, args.pub, frames=args.frames_live, seed=args.seed)


def _process(args) -> int:
    from .process import process_capture
    return process_capture(args.capture, args.out, fmt=args.format, settings_path=args.settings,
                           calibration_path=args.calibration, progress=not args.quiet,
                           skip_corrupt=args.skip_corrupt)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="cubecast", description="FMCW MIMO radar processing chain: ADC frames in, "
                                "point clouds out.")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

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
    s.add_argument("--seed", type=int, default=0)
    s.add_argument("--no-quantize", action="store_true", help="store canonical complex64 instead of the ADC format")
    s.add_argument("--quiet", action="store_true")
    s.set_defaults(func=_simulate)

    pr = sub.add_parser("process", help="process a capture offline into a point-cloud file")
    pr.add_argument("capture")
    pr.add_argument("--out", required=True, help="output file (.csv or .npz)")
    pr.add_argument("--format", choices=("csv", "npz"), default=None, help="default: from the file name")
    pr.add_argument("--settings", help="processing settings (TOML, [processing] section)")
    pr.add_argument("--calibration", help="calibration file (TOML)")
    pr.add_argument("--skip-corrupt", action="store_true",
                    help="skip frames whose CRC fails (each is reported); default: stop with an error")
    pr.add_argument("--quiet", action="store_true")
    pr.set_defaults(func=_process)
    return p


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except CubecastError as exc:
        print(f"cubecast {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
