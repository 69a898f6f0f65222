"""The hardware adapter: a development board's raw sample stream in, `adc` frames out. `cubecast adapter`.

A board's capture path sends its ADC samples as a stream of UDP datagrams: each datagram is a header
(a packet counter, the byte offset of its payload in the continuous sample stream, ...) and a payload
of consecutive stream bytes. The adapter reads that stream live (`--listen udp://HOST:PORT`) or from a
datagram file (`--file PATH`), cuts it into frames by byte offset, converts each complete frame to the
sensor's ADC format and publishes it on the wire (kind `adc`, digest and crc32, README "Wire format"), so `serve`
takes it like any other source.

How to read the stream is declared in a stream layout (streamlayout.py; README "Stream layout"); how
it is cut into frames, and what is counted, is in reassembly.py.

Datagram file: the datagrams as received, each written as its length (u32, little-endian) followed by
its bytes, one after the other, no file header (README "Datagram file"). `--save-datagrams PATH`
writes one from a live stream; `--file PATH` reads one.

Timestamps: live, the wall-clock time (time.time()) at which the first datagram of a frame arrived;
from a file, k x frame_period_s (the file holds no clock).

Layers: the stream layout (streamlayout.py: the file, FrameConverter), the Reassembler (reassembly.py:
datagrams -> frames and counters; pure, no I/O), and here StreamAdapter (sockets, files, publishing,
health lines once a second, SIGINT/SIGTERM via the CLI).

Logging (logger `cubecast.daemon.adapter`): the start line, the first datagram's header fields, the
health lines and the summary at INFO; warnings, dropped frames, malformed datagrams and restarts at
WARNING, each kind at most once per EVENT_LOG_INTERVAL_S (logs.RateLimitFilter).

A layout that cannot be right (layoutcheck.py: a header field misread, or a sensor frame size the stream
contradicts) is logged once at ERROR in plain words (file, field, fix). From a file the adapter then
stops reading and raises CubecastError (exit 2) after its summary; live, it goes on counting, publishes
nothing the stream contradicts, and every health line says so.
"""

from __future__ import annotations

import logging
import math
import re
import select
import socket
import struct
import threading
import time
from pathlib import Path
from typing import Iterator

from . import logs
from .errors import CubecastError, is_integer, is_real
from .reassembly import DEFAULT_WINDOW_FRAMES, AssembledFrame, Reassembler
from .sensor import Sensor
from .streamlayout import MAX_DATAGRAM_BYTES, StreamLayout, load_layout

DEFAULT_RCVBUF_BYTES = 8 * 1024 * 1024
DATAGRAM_LENGTH = struct.Struct("<I")
EVENT_LOG_INTERVAL_S = 5.0  # at most one line per kind of event (dropped, malformed, restart) in this time

log = logging.getLogger(__name__)


# ---- datagram files -------------------------------------------------------------------------------

class DatagramFileWriter:
    """Writes datagrams as u32 little-endian length + bytes, one after the other (no file header)."""

    def __init__(self, path: str | Path):
        try:
            self._f = open(path, "wb")
        except OSError as exc:
            raise CubecastError(f"--save-datagrams {path}: cannot create file: {exc.strerror or exc}") from None
        self.path = str(path)
        self.datagrams = 0

    def write(self, datagram) -> None:
        view = memoryview(datagram)
        if view.nbytes > MAX_DATAGRAM_BYTES:
            raise CubecastError(f"--save-datagrams {self.path}: datagram {self.datagrams} has {view.nbytes} bytes; "
                                f"a datagram file holds at most {MAX_DATAGRAM_BYTES} per datagram")
        try:
            self._f.write(DATAGRAM_LENGTH.pack(view.nbytes))
            self._f.write(view)
        except OSError as exc:
            raise CubecastError(f"--save-datagrams {self.path}: cannot write datagram {self.datagrams}: "
                                f"{exc.strerror or exc}") from None
        self.datagrams += 1

    def close(self) -> None:
        if self._f is not None:
            f, self._f = self._f, None
            try:
                f.close()
            except OSError as exc:
                raise CubecastError(f"--save-datagrams {self.path}: cannot finish the file: "
                                    f"{exc.strerror or exc}") from None

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
        return False


def iter_datagram_file(path: str | Path) -> Iterator[memoryview]:
    """Yields each datagram of a datagram file as a memoryview of a reused buffer (valid until the next
    one). A truncated last record is logged as a warning and ends the iteration; a length above
    65535 bytes (no UDP datagram is larger: not a datagram file) raises CubecastError."""
    try:
        f = open(path, "rb")
    except OSError as exc:
        raise CubecastError(f"--file {path}: cannot open: {exc.strerror or exc}") from None
    buf = bytearray(MAX_DATAGRAM_BYTES)
    view = memoryview(buf)
    pos = 0
    with f:
        while True:
            try:
                head = f.read(4)
            except OSError as exc:
                raise CubecastError(f"--file {path}: cannot read at byte {pos}: {exc.strerror or exc}") from None
            if not head:
                return
            if len(head) < 4:
                log.warning("cubecast adapter: warning: %s: the last record is truncated at byte %d (%d of 4 length "
                            "bytes); ignored", path, pos, len(head))
                return
            (n,) = DATAGRAM_LENGTH.unpack(head)
            if n > MAX_DATAGRAM_BYTES:
                raise CubecastError(f"{path}: record at byte {pos} has length {n}: a datagram is at most "
                                    f"{MAX_DATAGRAM_BYTES} bytes (is this a datagram file?)")
            try:
                got = f.readinto(view[:n])
            except OSError as exc:
                raise CubecastError(f"--file {path}: cannot read at byte {pos + 4}: {exc.strerror or exc}") from None
            if got < n:
                log.warning("cubecast adapter: warning: %s: the last record is truncated at byte %d (%d of %d bytes); "
                            "ignored", path, pos, got, n)
                return
            pos += 4 + n
            yield view[:n]


# ---- sockets, files, publishing -----------------------------------------------------------------

def parse_udp_endpoint(text: str) -> tuple[int, str, int]:
    """'udp://HOST:PORT' (IPv4 host or name, or [IPv6]) -> (address family, host, port)."""
    pattern = r"udp://(\[([0-9A-Fa-f:.]+)\]|([^\[\]:/]+)):(\d{1,5})"
    m = re.fullmatch(pattern, text.strip()) if isinstance(text, str) else None
    if not m or int(m.group(4)) > 65535:
        raise CubecastError(f"--listen {text!r}: must be udp://HOST:PORT with PORT 0..65535 "
                            "(e.g. udp://0.0.0.0:5700, or udp://[::]:5700 for IPv6)")
    if m.group(2):
        return socket.AF_INET6, m.group(2), int(m.group(4))
    return socket.AF_INET, m.group(3), int(m.group(4))


def _format_stats(s: dict) -> str:
    def reasons(d):
        return f" ({', '.join(f'{k} {v}' for k, v in sorted(d.items()))})" if d else ""
    return (f"packets {s['packets']} (malformed {s['malformed']}{reasons(s['malformed_reasons'])}, implausible "
            f"{s['implausible']}{reasons(s['implausible_reasons'])}, held {s['held']}), used {s['used']}, "
            f"duplicates {s['duplicates']}, reordered {s['reordered']}, lost {s['lost']}, late {s['late']}; "
            f"frames complete {s['frames_complete']}, dropped {s['frames_dropped']}{reasons(s['drop_reasons'])}"
            + (f"; restarts {s['restarts']}" if s["restarts"] else ""))


class StreamAdapter:
    """`cubecast adapter`: StreamAdapter(layout, sensor, pub, listen=... | file=...).run(stop) -> stats.

    listen: 'udp://HOST:PORT' (port 0 picks a free one; see `udp_address` once `ready` is set);
    file: a datagram file; frames: stop after this many published frames (0 = no limit); speed: file
    mode only, factor of the frame period (None = as fast as possible); window_frames: frames in
    flight; save_datagrams: live mode, also write every datagram received to this datagram file.
    Health (the Reassembler's counters plus `frames_published`) once every `health_interval_s`."""

    def __init__(self, layout: StreamLayout, sensor: Sensor, pub_endpoint: str = "tcp://127.0.0.1:5601", *,
                 listen: str | None = None, file: str | Path | None = None, frames: int = 0,
                 speed: float | None = None, window_frames: int = DEFAULT_WINDOW_FRAMES, wait_s: float = 1.0,
                 rcvbuf_bytes: int = DEFAULT_RCVBUF_BYTES, save_datagrams: str | Path | None = None,
                 context=None, health_interval_s: float = 1.0):
        if (listen is None) == (file is None):
            raise CubecastError("adapter: give exactly one of --listen udp://HOST:PORT or --file PATH")
        if isinstance(frames, bool) or not isinstance(frames, int) or frames < 0:
            raise CubecastError(f"--frames {frames!r}: must be a whole number >= 0 (0 = no limit)")
        if speed is not None and not (speed > 0 and math.isfinite(speed)):
            raise CubecastError(f"--speed {speed!r}: must be a number > 0 or 'max'")
        if save_datagrams is not None and listen is None:
            raise CubecastError("--save-datagrams applies to --listen only (a --file is already saved)")
        for name, value, zero_ok in (("health_interval_s", health_interval_s, False), ("wait_s", wait_s, True)):
            if not is_real(value) or not math.isfinite(value) or value < 0 or (value == 0 and not zero_ok):
                raise CubecastError(f"adapter {name} = {value!r}: must be a number of seconds "
                                    + (">= 0" if zero_ok else "> 0"))
        if not is_integer(rcvbuf_bytes) or rcvbuf_bytes <= 0:
            raise CubecastError(f"adapter rcvbuf_bytes = {rcvbuf_bytes!r}: must be a whole number of bytes > 0")
        self.udp = parse_udp_endpoint(listen) if listen is not None else None
        self.file = file
        if file is not None and not Path(file).is_file():
            raise CubecastError(f"--file {file}: no such file")
        self.layout, self.sensor = layout, sensor
        self.reassembler = Reassembler(layout, sensor, window_frames)
        self.pub_endpoint = pub_endpoint
        self.frames, self.speed, self.wait_s = frames, speed, wait_s
        self.rcvbuf_bytes, self.save_datagrams = rcvbuf_bytes, save_datagrams
        self.context = context
        self.health_interval_s = health_interval_s
        self.ready = threading.Event()
        self.udp_address: tuple | None = None
        self.publisher = None
        self.frames_published = 0
        self.last_health: dict | None = None
        self._lock = threading.Lock()
        self._epoch = 0
        self._pace: tuple[float, int] | None = None
        self._next_health = math.inf
        self._warned: set[str] = set()
        self._layout_reported: list[str] = []
        self._event_limit = logs.RateLimitFilter(EVENT_LOG_INTERVAL_S)  # attached to `log` while running

    def bind(self) -> str:
        """Bind the publishing socket (before run, to learn the endpoint of tcp://...:*); returns it."""
        if self.publisher is None:
            from .netio import command_publisher_security
            from .sources import AdcPublisher
            self.publisher = AdcPublisher(self.sensor, self.pub_endpoint, context=self.context,
                                          **command_publisher_security())  # the command's keys / --insecure
        return self.publisher.endpoint

    def stats(self) -> dict:
        with self._lock:
            s = self.reassembler.stats()
        s["frames_published"] = self.frames_published
        return s

    def _done(self) -> bool:
        return bool(self.frames) and self.frames_published >= self.frames

    def _publish(self, frames: list[AssembledFrame], stop: threading.Event, live: bool) -> None:
        from .sources import new_run_id
        pub = self.publisher
        for fr in frames:
            if self._done() or (stop.is_set() and not live and self.speed is not None):
                return
            if fr.epoch != self._epoch:
                self._epoch = fr.epoch
                pub.run_id = new_run_id()
                self._pace = None
            if live:
                ts = fr.arrival_s
            else:
                ts = fr.index * self.sensor.frame_period_s
                if self.speed is not None:
                    self._wait_pace(fr.index, stop)
            pub.seq = fr.index  # the wire seq is the frame's number in the stream
            pub.send(fr.data, ts)
            self.frames_published += 1
            self._tick()  # a paced burst (frames replayed at once) still reports on time

    def _wait_pace(self, index: int, stop: threading.Event) -> None:
        now = time.monotonic()
        if self._pace is None:
            self._pace = (now, index)
            return
        t0, k0 = self._pace
        target = t0 + (index - k0) * self.sensor.frame_period_s / self.speed
        if now - target > 0.5:  # stalled: re-anchor instead of bursting
            self._pace = (now, index)
            return
        if target > now:
            stop.wait(target - now)

    def _check_layout(self) -> bool:
        """Log what the layout checks found (reassembly.py layout_errors) once, at ERROR; True while the
        layout (or the sensor's frame size) cannot be right."""
        errors = self.reassembler.layout_errors
        if errors != self._layout_reported:
            self._layout_reported = list(errors)
            for text in errors:
                log.error("cubecast adapter: error: %s", text)
        return bool(errors)

    def _log_events(self) -> None:
        r = self.reassembler
        while r.events:
            kind, text = r.events.popleft()
            if kind == "unchecked":
                log.info("cubecast adapter: %s", text)
                continue
            if kind == "frame_number" and kind in self._warned:
                continue
            if kind == "frame_number":
                self._warned.add(kind)
                log.warning("cubecast adapter: warning: %s; check that the sensor description's frame "
                            "(chirps_per_frame x rx x samples_per_chirp) matches what the board streams", text)
                continue
            log.warning("cubecast adapter: %s: %s", kind, text, extra={"reason": kind})
        self._event_limit.flush(log, prefix="cubecast adapter: ")

    def _show_first(self) -> None:
        first = self.reassembler.first_header
        if first is not None and "first" not in self._warned:
            self._warned.add("first")
            log.info("cubecast adapter: first datagram: %s", ", ".join(f"{k} {v}" for k, v in first.items()))

    def _tick(self) -> None:
        """The events and a health line, once every health_interval_s."""
        if (now := time.monotonic()) >= self._next_health:
            self._next_health = now + self.health_interval_s
            self._log_events()
            self._health()

    def _health(self) -> None:
        s = self.stats()
        self.last_health = s
        log.info("cubecast adapter: %s; published %d%s", _format_stats(s), s["frames_published"],
                 "; the layout error above stands" if self._layout_reported else "")

    def _open_udp(self) -> socket.socket:
        family, host, port = self.udp
        sock = socket.socket(family, socket.SOCK_DGRAM)
        try:
            sock.setsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF, self.rcvbuf_bytes)
            got = sock.getsockopt(socket.SOL_SOCKET, socket.SO_RCVBUF)
            if got < self.rcvbuf_bytes:  # Linux reports twice the size it grants
                log.warning("cubecast adapter: warning: the UDP receive buffer is %d bytes, %d asked for; bursts "
                            "may be lost (on Linux raise net.core.rmem_max)", got, self.rcvbuf_bytes)
            sock.bind((host, port))
        except OSError as exc:
            sock.close()
            raise CubecastError(f"--listen udp://{host}:{port}: cannot bind: {exc.strerror or exc}") from None
        sock.setblocking(False)
        self.udp_address = sock.getsockname()
        return sock

    def _run_udp(self, stop: threading.Event) -> None:
        sock = self._open_udp()
        saver = DatagramFileWriter(self.save_datagrams) if self.save_datagrams is not None else None
        poller = select.poll()
        poller.register(sock.fileno(), select.POLLIN)
        buf = bytearray(MAX_DATAGRAM_BYTES + 1)
        view = memoryview(buf)
        r = self.reassembler
        log.info("cubecast adapter: listening on udp %s:%s, publishing '%s' on %s (run %s, frames of %d stream "
                 "bytes)", self.udp_address[0], self.udp_address[1], self.sensor.sensor_id, self.publisher.endpoint,
                 self.publisher.run_id, r.frame_bytes)
        self.ready.set()
        self._next_health = time.monotonic() + self.health_interval_s
        try:
            while not stop.is_set() and not self._done():
                try:
                    n = sock.recv_into(buf)
                except (BlockingIOError, InterruptedError):
                    poller.poll(100)
                    n = -1
                if n >= 0:
                    dg = view[:n]
                    if saver is not None:
                        saver.write(dg)
                    with self._lock:
                        frames = r.feed(dg, time.time())
                    if "first" not in self._warned:
                        self._show_first()
                    self._check_layout()  # live: said, and counted on
                    if frames:
                        self._publish(frames, stop, live=True)
                self._tick()
        finally:
            sock.close()
            if saver is not None:
                saver.close()

    def _run_file(self, stop: threading.Event) -> None:
        r = self.reassembler
        log.info("cubecast adapter: reading %s, publishing '%s' on %s (run %s, frames of %d stream bytes)",
                 self.file, self.sensor.sensor_id, self.publisher.endpoint, self.publisher.run_id, r.frame_bytes)
        self.ready.set()
        self._next_health = time.monotonic() + self.health_interval_s
        for dg in iter_datagram_file(self.file):
            if stop.is_set() or self._done():
                break
            with self._lock:
                frames = r.feed(dg)
            if "first" not in self._warned:
                self._show_first()
            if frames:
                self._publish(frames, stop, live=False)
            if self._check_layout():  # a file: no point in reading on
                break
            self._tick()

    def run(self, stop: threading.Event | None = None) -> dict:
        """Until the stream ends (file), --frames, or `stop`; then flush. Returns the final stats."""
        stop = stop or threading.Event()
        self.bind()
        log.addFilter(self._event_limit)
        try:
            self.publisher.wait_for_subscribers(1, self.wait_s, stop)
            if self.udp is not None:
                self._run_udp(stop)
            else:
                self._run_file(stop)
            with self._lock:
                frames = self.reassembler.flush()
            self._publish(frames, stop, live=self.udp is not None)
        finally:
            if self.publisher is not None:
                self.publisher.close()
                self.publisher = None
            self._log_events()
            self._event_limit.flush(log, force=True, prefix="cubecast adapter: ")
            log.removeFilter(self._event_limit)
        self._check_layout()
        s = self.stats()
        self.last_health = s
        log.info("cubecast adapter: published %d frames; %s", s["frames_published"], _format_stats(s))
        if self.file is not None and self.reassembler.layout_errors:
            raise CubecastError(f"--file {self.file}: " + "; ".join(self.reassembler.layout_errors))
        return s


def adapter(layout_path: str, sensor_path: str, pub: str, *, listen: str | None = None, file: str | None = None,
            frames: int = 0, speed: str = "1", window_frames: int = DEFAULT_WINDOW_FRAMES,
            save_datagrams: str | None = None) -> int:
    """`cubecast adapter`: until the file ends, --frames, SIGINT or SIGTERM."""
    from .sensor import load_sensor
    from .netio import stop_on_signals
    from .sources import parse_speed
    layout = load_layout(layout_path)
    sensor = load_sensor(sensor_path)
    stop = threading.Event()
    with stop_on_signals(stop):
        a = StreamAdapter(layout, sensor, pub, listen=listen, file=file, frames=frames, speed=parse_speed(speed),
                          window_frames=window_frames, save_datagrams=save_datagrams)
        a.run(stop)
    return 0


def _run_args(args) -> int:
    return adapter(args.layout, args.sensor, args.pub, listen=args.listen, file=args.file, frames=args.frames,
                   speed=args.speed, window_frames=args.window_frames, save_datagrams=args.save_datagrams)


def add_parser(subparsers):
    """Add the `adapter` subcommand to an argparse subparsers object; returns its parser."""
    p = subparsers.add_parser(
        "adapter", help="read a board's raw sample stream (UDP datagrams or a datagram file) and publish ADC frames")
    src = p.add_mutually_exclusive_group(required=True)
    src.add_argument("--listen", metavar="udp://HOST:PORT", help="receive the board's datagrams on this UDP address")
    src.add_argument("--file", metavar="PATH", help="read datagrams from a datagram file (u32 length + bytes each)")
    p.add_argument("--layout", required=True, help="stream layout (TOML): header fields, sample type, axis order")
    p.add_argument("--sensor", required=True, help="sensor description (TOML): frame size and ADC format")
    p.add_argument("--pub", default="tcp://127.0.0.1:5601", metavar="ENDPOINT",
                   help="endpoint to bind for the ADC frames (default tcp://127.0.0.1:5601)")
    p.add_argument("--frames", type=int, default=0, metavar="N",
                   help="stop after N published frames (default: no limit)")
    p.add_argument("--speed", default="1",
                   help="with --file: factor of the frame period, or 'max' (default 1 = the sensor's frame rate)")
    p.add_argument("--window-frames", type=int, default=DEFAULT_WINDOW_FRAMES, metavar="N",
                   help=f"frames in flight before the oldest incomplete one is dropped "
                        f"(default {DEFAULT_WINDOW_FRAMES})")
    p.add_argument("--save-datagrams", metavar="PATH",
                   help="with --listen: also write every datagram to a datagram file")
    p.set_defaults(func=_run_args)
    return p
