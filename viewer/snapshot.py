"""Offscreen rendering of the viewer to a PNG, with no display.

    render_snapshot(messages, "out.png", size=(1280, 800))

`messages` are decoded wire messages (feed.decode_parts' dicts), fed in order into a ViewerState, so
several `points` messages build up the persistence trail exactly as the live window would.

The GL context comes from EGL without a display (Mesa's surfaceless platform, software rasteriser
llvmpipe): system packages libegl1, libegl-mesa0, libgl1, libgl1-mesa-dri, libfontconfig1. Set
CUBECAST_OFFSCREEN=osmesa to use OSMesa instead (libosmesa6; OSMESA_LIBRARY may name the library).
The backend is chosen once per process, before the first canvas.
"""

from __future__ import annotations

import os
import time
import zlib
import struct
from pathlib import Path

import numpy as np

from . import views as V

_BACKEND: str | None = None
_BACKEND_ERROR: str | None = None


class OffscreenUnavailable(RuntimeError):
    """No offscreen GL context could be created on this machine."""


def offscreen_backend() -> str:
    """Select the offscreen vispy app backend once per process and prove it can make a context;
    returns its name or raises OffscreenUnavailable with the reason."""
    global _BACKEND, _BACKEND_ERROR
    if _BACKEND is not None:
        return _BACKEND
    if _BACKEND_ERROR is not None:
        raise OffscreenUnavailable(_BACKEND_ERROR)
    name = os.environ.get("CUBECAST_OFFSCREEN", "egl").strip().lower()
    try:
        if name == "egl":
            os.environ.setdefault("EGL_PLATFORM", "surfaceless")
        elif name == "osmesa":
            if "OSMESA_LIBRARY" not in os.environ:
                for cand in ("/usr/lib/x86_64-linux-gnu/libOSMesa.so.8", "/usr/lib/aarch64-linux-gnu/libOSMesa.so.8"):
                    if os.path.exists(cand):
                        os.environ["OSMESA_LIBRARY"] = cand
                        break
        else:
            raise OffscreenUnavailable(f"CUBECAST_OFFSCREEN = {name!r}: 'egl' or 'osmesa'")
        import vispy
        vispy.use(app=name)
        from vispy import scene
        probe = scene.SceneCanvas(size=(8, 8), show=False)
        probe.render()
        probe.close()
    except OffscreenUnavailable as exc:
        _BACKEND_ERROR = str(exc)
        raise
    except Exception as exc:
        _BACKEND_ERROR = (f"no offscreen OpenGL context via {name}: {type(exc).__name__}: {exc}. "
                          f"Install the system packages libegl1 libegl-mesa0 libgl1 libgl1-mesa-dri "
                          f"libfontconfig1 (EGL) or libosmesa6 (CUBECAST_OFFSCREEN=osmesa)")
        raise OffscreenUnavailable(_BACKEND_ERROR) from None
    _BACKEND = name
    return name


def write_png(path: str | Path, rgba: np.ndarray) -> None:
    """A minimal PNG writer (8-bit RGB or RGBA, zlib-compressed, PNG specification, W3C 2003)."""
    img = np.ascontiguousarray(rgba, np.uint8)
    h, w, c = img.shape
    color_type = {3: 2, 4: 6}[c]
    raw = np.empty((h, 1 + w * c), np.uint8)
    raw[:, 0] = 0  # filter: none
    raw[:, 1:] = img.reshape(h, w * c)

    def chunk(tag: bytes, data: bytes) -> bytes:
        return struct.pack(">I", len(data)) + tag + data + struct.pack(">I", zlib.crc32(tag + data) & 0xFFFFFFFF)

    png = (b"\x89PNG\r\n\x1a\n" + chunk(b"IHDR", struct.pack(">IIBBBBB", w, h, 8, color_type, 0, 0, 0))
           + chunk(b"IDAT", zlib.compress(raw.tobytes(), 6)) + chunk(b"IEND", b""))
    tmp = Path(str(path) + ".part")
    tmp.write_bytes(png)
    os.replace(tmp, path)


def make_state(messages, endpoint: str = "", sensor_id: str | None = None, color_by: str = "velocity",
               persist_frames: int = V.DEFAULT_PERSIST_FRAMES, sensor_height_m: float | None = None,
               velocity_span_mps: float = V.DEFAULT_VELOCITY_SPAN_MPS, bad_by_reason: dict | None = None,
               idle_s: float = 0.0, connected: bool | None = None, view_frame: str = "sensor",
               frontend_panel: bool = False) -> V.ViewerState:
    state = V.ViewerState(endpoint=endpoint, sensor_id=sensor_id, persist=V.Persistence(persist_frames),
                          color_by=color_by, sensor_height_m=sensor_height_m, velocity_span_mps=velocity_span_mps,
                          frame=view_frame, show_frontend=frontend_panel)
    for m in messages:
        state.ingest(m)
    if bad_by_reason:
        state.bad_by_reason = dict(bad_by_reason)
        state.bad = sum(bad_by_reason.values())
    state.idle_s = idle_s
    state.connected = connected
    return state


def render_state(state: V.ViewerState, size=(1280, 800), footer: str = "", help_overlay: bool = False):
    """Render a ViewerState offscreen: (RGBA uint8 [h, w, 4], the ViewerCanvas used)."""
    offscreen_backend()
    from .canvas import ViewerCanvas
    vc = ViewerCanvas(size=tuple(int(v) for v in size), show=False, dpi=96)
    vc.show_state(state, footer=footer)
    vc.set_help(help_overlay)
    img = vc.render()
    return img, vc


def render_snapshot(messages, out_png: str | Path, size=(1280, 800), *, endpoint: str = "",
                    sensor_id: str | None = None, color_by: str = "velocity",
                    persist_frames: int = V.DEFAULT_PERSIST_FRAMES,
                    sensor_height_m: float | None = None,
                    velocity_span_mps: float = V.DEFAULT_VELOCITY_SPAN_MPS, footer: str = "",
                    help_overlay: bool = False, view_frame: str = "sensor", frontend_panel: bool = False) -> np.ndarray:
    """Render decoded wire messages to a PNG file; returns the RGBA pixels written."""
    state = make_state(messages, endpoint=endpoint, sensor_id=sensor_id, color_by=color_by,
                       persist_frames=persist_frames, sensor_height_m=sensor_height_m,
                       velocity_span_mps=velocity_span_mps, view_frame=view_frame, frontend_panel=frontend_panel)
    img, vc = render_state(state, size, footer=footer, help_overlay=help_overlay)
    vc.canvas.close()
    write_png(out_png, img[..., :3])
    return img


SETTLE_S = 1.0   # every sensors: done once no new sensor has appeared for this long


def collect_from_sub(endpoint: str, sensor: str | None = None, wait_s: float = 10.0,
                     want_frames: int = V.DEFAULT_PERSIST_FRAMES, keys=None,
                     every_sensor: bool = False) -> tuple[list[dict], dict]:
    """Listen on `endpoint` for at most `wait_s`: until a sensor description, a range-Doppler map and
    `want_frames` point clouds of one sensor have come (`every_sensor`: a description and
    `want_frames` clouds of every sensor seen, none new for SETTLE_S). Returns (messages in arrival
    order, info)."""
    from .feed import Feed
    msgs: list[dict] = []
    seen: dict[tuple[str, str], int] = {}
    clouds: dict[str, int] = {}
    t_end = time.monotonic() + wait_s
    n_sensors, settled_s = 0, time.monotonic()
    with Feed(endpoint, sensor, keys=keys) as feed:
        snap = feed.snapshot()
        while time.monotonic() < t_end:
            snap = feed.snapshot()
            for sid, kinds in snap.counts.items():
                for kind, n in kinds.items():
                    if seen.get((sid, kind), 0) != n:
                        seen[(sid, kind)] = n
                        msgs.append(snap.latest[sid][kind])
                        if kind == "points":
                            clouds[sid] = clouds.get(sid, 0) + 1
            done = [sid for sid, n in clouds.items() if n >= want_frames
                    and (sid, "sensor") in seen and (sid, "rdmap") in seen]
            if every_sensor:
                sids = {sid for sid, _ in seen}
                if len(sids) != n_sensors:
                    n_sensors, settled_s = len(sids), time.monotonic()
                ready = all(clouds.get(sid, 0) >= want_frames and (sid, "sensor") in seen for sid in sids)
                if done and ready and time.monotonic() - settled_s >= SETTLE_S:
                    break
            elif done:
                break
            if feed.error is not None:
                raise feed.error
            time.sleep(0.01)
        info = {"bad_by_reason": snap.bad_by_reason, "idle_s": snap.idle_s(), "connected": snap.connected,
                "received": snap.received}
    msgs.sort(key=lambda m: m["received_s"])
    return msgs, info
