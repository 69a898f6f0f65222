"""The live window: a Feed on its own thread, a ViewerCanvas, keys and a GUI timer.

The timer (30 Hz, on the GUI thread) takes a snapshot of the feed's latest-value slots, hands new
messages of the shown sensor to the ViewerState, and updates the visuals only when something changed:
one set_data per visual per displayed frame. The GUI never waits on the network.
"""

from __future__ import annotations

import logging
import math
import os
import time

import numpy as np

from . import views as V
from .feed import Feed

log = logging.getLogger(__name__)

TICK_S = 1.0 / 30.0
STATUS_EVERY_S = 0.25
NOTICE_S = 6.0     # how long the footer shows what a key did (the saved file's path)
CLICK_PX = 4.0     # a press and release closer than this is a click, not a drag


class ViewerApp:
    def __init__(self, feed, *, size=(1280, 800), sensor: str | None = None, show: bool = True,
                 persist_frames: int = V.DEFAULT_PERSIST_FRAMES, color_by: str = "velocity",
                 velocity_span_mps: float = V.DEFAULT_VELOCITY_SPAN_MPS,
                 sensor_height_m: float | None = None, stall_after_s: float = 3.0, dpi=None,
                 canvas=None, view_frame: str = "sensor", tuning=None, frontend_panel: bool = False):
        from .canvas import ViewerCanvas
        self.feed = feed
        self.tuning = tuning  # a tuning.TuningClient (view --control), or None
        self.stall_after_s = stall_after_s
        self.options = dict(persist_frames=persist_frames, color_by=color_by, velocity_span_mps=velocity_span_mps,
                            sensor_height_m=sensor_height_m, view_frame=view_frame, frontend_panel=frontend_panel)
        self.fixed_sensor = (sensor or "").rstrip("/") or None
        self.vc = canvas or ViewerCanvas(size=size, show=show, title=f"cubecast view · {feed.endpoint}", dpi=dpi)
        self.state = self._new_state(self.fixed_sensor)
        self._seen: dict[tuple[str, str], int] = {}
        self._step_pending = False
        self._last_status_s = 0.0
        self.saved: list[str] = []
        self.closed = False
        self.vc.canvas.events.key_press.connect(self._on_key)
        self.vc.canvas.events.close.connect(self._on_close)
        self.vc.canvas.events.mouse_press.connect(self._on_mouse_press)
        self.vc.canvas.events.mouse_release.connect(self._on_mouse_release)
        self._press_px = None
        self._notice, self._notice_until_s = "", 0.0
        self.timer = None
        self.vc.show_state(self.state)

    def _new_state(self, sensor_id: str | None) -> V.ViewerState:
        o = self.options
        st = V.ViewerState(endpoint=self.feed.endpoint, sensor_id=sensor_id,
                           persist=V.Persistence(o["persist_frames"]), color_by=o["color_by"],
                           velocity_span_mps=o["velocity_span_mps"], sensor_height_m=o["sensor_height_m"],
                           stall_after_s=self.stall_after_s, frame=o["view_frame"], show_frontend=o["frontend_panel"])
        return st

    # ---- the timer ----
    def start(self) -> "ViewerApp":
        from vispy import app
        self.timer = app.Timer(interval=TICK_S, connect=self.tick, start=True)
        return self

    def tick(self, event=None, now_s: float | None = None) -> bool:
        """Pull the latest messages; True when the panels were redrawn with new data."""
        now_s = time.monotonic() if now_s is None else now_s
        snap = self.feed.snapshot()
        st = self.state
        st.bad, st.bad_by_reason = snap.bad, snap.bad_by_reason
        st.connected, st.idle_s = snap.connected, snap.idle_s(now_s)
        if st.sensor_id is None and snap.latest:
            st.sensor_id = sorted(snap.latest)[0]
        changed = False
        latest = snap.latest.get(st.sensor_id, {}) if st.sensor_id else {}
        counts = snap.counts.get(st.sensor_id, {}) if st.sensor_id else {}
        for kind in ("sensor", "health", "frontend", "rdmap", "points"):
            msg, n = latest.get(kind), counts.get(kind, 0)
            if msg is None or self._seen.get((st.sensor_id, kind)) == n:
                continue
            if kind in ("points", "rdmap", "frontend") and st.paused and not self._step_pending:
                continue    # frozen: the slot keeps only the newest, taken on resume or step
            if kind == "points" and st.paused:
                st.last_seq = None  # a step is not a gap
            self._seen[(st.sensor_id, kind)] = n
            st.ingest(msg)
            changed = True
            if kind == "points":
                self._step_pending = False
        if st.frame == "platform" and not (st.paused and not self._step_pending):
            changed |= self._take_others(snap)
        if changed:
            self.vc.show_data(st)
        notice = self.tuning.take_notice() if self.tuning is not None else None
        if notice:
            self._say(notice)   # what serve said to a tuning key, in the footer at once
            self._last_status_s = -math.inf
        if changed or now_s - self._last_status_s >= STATUS_EVERY_S:
            self._last_status_s = now_s
            self.vc.show_status(st, self._footer(now_s))
            changed = True
        if self.vc.refresh_axes() or changed:
            self.vc.canvas.update()
        return changed

    def _take_others(self, snap) -> bool:
        """The platform picture: the other sensors' new descriptions and point clouds."""
        changed = False
        for sid, latest in snap.latest.items():
            if sid == self.state.sensor_id:
                continue
            for kind in ("sensor", "points"):
                msg, n = latest.get(kind), snap.counts.get(sid, {}).get(kind, 0)
                if msg is None or self._seen.get((sid, kind)) == n:
                    continue
                self._seen[(sid, kind)] = n
                changed |= self.state.ingest(msg)
        return changed

    # ---- keys ----
    def _on_key(self, event) -> None:
        name = event.key.name if event.key is not None else ""
        self.handle_key(name, event.text or "")

    def handle_key(self, name: str, text: str = "") -> None:
        st = self.state
        k = text if text and text.isprintable() and text != " " else name
        if k in ("Space", " "):
            st.paused = not st.paused
            if not st.paused:
                st.last_seq = None
        elif k in ("Right", "."):
            if st.paused:
                self._step_pending = True
        elif k in ("c", "C"):
            order = V.COLOR_BY if st.frame == "platform" else V.COLOR_BY[:2]
            st.color_by = order[(order.index(st.color_by) + 1) % len(order)] if st.color_by in order else order[0]
            self.options["color_by"] = st.color_by
        elif k in ("[", "]"):
            f = 0.5 if k == "[" else 2.0
            st.velocity_span_mps = min(64.0, max(0.125, st.velocity_span_mps * f))
            self.options["velocity_span_mps"] = st.velocity_span_mps
        elif k in ("-", "+", "="):
            n = st.persist.n_frames + (-1 if k == "-" else 1)
            st.set_persist_frames(min(50, max(1, n)))
            self.options["persist_frames"] = st.persist.n_frames
        elif k in ("n", "N"):
            self.next_sensor()
            return
        elif k in ("p", "P"):
            self.toggle_platform()
            return
        elif k in ("m", "M"):
            st.show_frontend = not st.show_frontend
            self.options["frontend_panel"] = st.show_frontend
        elif k in ("r", "R"):
            self.vc.reset_cameras(st)
        elif k in ("s", "S"):
            self.save_png()
        elif k in ("h", "H", "?"):
            self.vc.set_help(not self.vc.help_visible)
        elif k in ("q", "Q", "Escape"):
            self.close()
            return
        elif self.tuning is not None and self.tuning.press(k):
            self._say(f"tuning: key {k} sent to {self.tuning.endpoint}")
        else:
            return
        self.vc.show_state(st, self._footer())
        self.vc.canvas.update()

    def _footer(self, now_s: float | None = None) -> str:
        """A notice (what the last key did) for NOTICE_S, else the default footer."""
        now_s = time.monotonic() if now_s is None else now_s
        return self._notice if now_s < self._notice_until_s else ""

    def _say(self, text: str) -> None:
        self._notice, self._notice_until_s = text, time.monotonic() + NOTICE_S
        log.info("cubecast view: %s", text)

    # ---- mouse: a click (press and release in one place) picks a point or a map cell ----
    def _on_mouse_press(self, event) -> None:
        self._press_px = np.asarray(event.pos, np.float64) if event.button == 1 else None

    def _on_mouse_release(self, event) -> None:
        start, self._press_px = self._press_px, None
        if start is None or event.button != 1 or np.hypot(*(np.asarray(event.pos) - start)) > CLICK_PX:
            return   # a drag pans; only a click picks
        self.click(start * np.asarray(self.vc.canvas.pixel_scale))

    def click(self, px) -> list[str] | None:
        """Show the numbers of what is drawn at canvas pixel `px` (physical pixels), or close the panel
        when nothing is there. Returns the lines shown."""
        self.state.selection = self.vc.pick(self.state, px)
        self.vc.show_selection(self.state.selection)
        self.vc.canvas.update()
        return self.state.selection

    def next_sensor(self) -> None:
        if self.fixed_sensor:
            return
        ids = sorted(self.feed.snapshot().latest)
        if not ids:
            return
        cur = self.state.sensor_id
        nxt = ids[(ids.index(cur) + 1) % len(ids)] if cur in ids else ids[0]
        if nxt == cur:
            return
        self._restart_state(nxt)

    def toggle_platform(self) -> None:
        """Between one sensor in its own frame and every sensor on the bus in the platform frame."""
        self.options["view_frame"] = "sensor" if self.state.frame == "platform" else "platform"
        if self.options["view_frame"] == "sensor" and self.state.color_by == "sensor":
            self.options["color_by"] = "velocity"
        self._restart_state(self.state.sensor_id)
        self._say("platform frame: every sensor in one picture" if self.options["view_frame"] == "platform"
                  else f"sensor frame: {self.state.sensor_id or 'the first sensor'} alone")
        self.vc.show_status(self.state, self._footer())

    def _restart_state(self, sensor_id: str | None) -> None:
        paused = self.state.paused
        self.state = self._new_state(sensor_id)
        self.state.paused = paused
        self.vc.show_selection(None)
        self._seen = {}
        self.vc.reset_cameras(self.state)
        self.tick()

    def save_png(self, path: str | None = None) -> str:
        from .snapshot import write_png
        path = path or time.strftime("cubecast-view-%Y%m%d-%H%M%S.png")
        img = self.vc.canvas.render(alpha=False)
        write_png(path, img[..., :3])
        self.saved.append(path)
        self._say(f"saved {os.path.abspath(path)}")
        return path

    def close(self) -> None:
        if self.closed:
            return
        self.closed = True
        if self.timer is not None:
            self.timer.stop()
        self.vc.canvas.close()

    def _on_close(self, event=None) -> None:
        self.closed = True
        if self.timer is not None:
            self.timer.stop()
        self.feed.stop()
        if self.tuning is not None:
            self.tuning.stop()


def run_window(endpoint: str | list[str], sensor: str | None = None, size=(1280, 800), stall_after_s: float = 3.0,
               keys=None, control: str | None = None, **options) -> int:
    """Open the window on `endpoint` and run until it is closed (keys: keyfiles.FeedKeys, or None;
    control: serve's control endpoint for the tuning keys, which use the same keys)."""
    from vispy import app
    feed = Feed(endpoint, sensor, keys=keys)
    if control is not None:
        from .tuning import TuningClient
        options["tuning"] = TuningClient(control, keys)
    try:
        feed.start()
    except Exception as exc:
        log.error("cubecast view: error: --sub %s: %s", feed.endpoint, exc)
        return 2
    try:
        viewer = ViewerApp(feed, size=size, sensor=sensor, show=True, stall_after_s=stall_after_s, **options)
    except Exception as exc:  # no display, no GL: say so in one line
        feed.stop()
        log.error("cubecast view: error: cannot open a window (%s: %s); use --snapshot PNG to render without "
                  "a display", type(exc).__name__, " ".join(str(exc).split()))
        return 2
    viewer.start()
    if viewer.tuning is not None:
        viewer.tuning.start()
    try:
        app.run()
    finally:
        viewer.close()
        feed.stop()
        if viewer.tuning is not None:
            viewer.tuning.stop()
    return 0
