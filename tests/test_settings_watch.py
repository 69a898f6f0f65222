"""Live tuning (serve --watch-settings): a changed settings file is applied at the next frame, the
change logged and counted in health; a file that does not validate (or whose chain cannot be built)
is refused whole and the running settings kept. Checked against the single-process chain built directly with each settings (over
real sockets on 127.0.0.1, bounded waits)."""

from __future__ import annotations

import os
import threading
import time

import numpy as np

from cubecast.daemon.chain.pipeline import Pipeline
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.chain.points import to_records
from cubecast.daemon.files import to_canonical
from cubecast.daemon.settings import ProcessingSettings, load_settings
from cubecast.daemon.retune import Tuner
from cubecast.daemon.settingswatch import POLL_S, changed_fields
from cubecast.daemon.sources import AdcPublisher
from tests.test_service import Collector, connected, running_service, wait_until
from tests.test_workers import YARD, frames, sensor  # noqa: F401

NEAR = "[processing]\nmin_range_m = 0.5\n"
FAR = "[processing]\nmin_range_m = 12.0\ncfar_pfa = 1e-5\n"
BAD = "[processing]\ncfar_pfa = 0.9\n"


def _write(path, text):
    tmp = f"{path}.tmp"
    with open(tmp, "w", encoding="utf-8") as f:
        f.write(text)
    os.replace(tmp, path)   # as an editor saving atomically does


class FakeProcessor:
    """prepare / commit / abort as serve's processors offer them; the build refuses one range gate."""

    def __init__(self):
        self.built, self.used = [], []

    def prepare(self, settings, epoch):
        from cubecast.daemon.processors import Change

        def build():
            if settings.max_range_m == 999.0:
                raise CubecastError("max_range_m = 999.0: beyond the sensor's maximum range")
            self.built.append(settings)
            return ("chain", settings.min_range_m)
        return Change(settings, epoch, build)

    def commit(self, change):
        self.used.append(change.chain)

    def abort(self, change):
        pass


def test_watch_applies_after_the_file_settles_and_refuses_a_bad_one(tmp_path):
    path = tmp_path / "s.toml"
    _write(path, NEAR)
    proc = FakeProcessor()
    w = Tuner(load_settings(path), proc, str(path))
    t = 100.0
    assert w.poll(t) is None                     # unchanged
    _write(path, FAR)
    os.utime(path, ns=(1, 1))                    # a modification time of its own, whatever the clock's resolution
    t += POLL_S
    assert w.poll(t) is None                     # changed: waits one poll for it to settle
    t += POLL_S
    assert w.poll(t) is None                     # read in the background
    applied = None
    deadline = time.monotonic() + 5
    while applied is None and time.monotonic() < deadline:   # then built in the background, then applied
        applied = w.poll(t)
        time.sleep(0.01)
    assert applied is not None and proc.used == [("chain", 12.0)]
    assert applied.min_range_m == 12.0 and applied.cfar_pfa == 1e-5 and w.current == applied
    assert w.applied == 1 and w.refused == 0 and w.epoch == 1
    assert changed_fields(ProcessingSettings(), applied) == {"min_range_m": (0.5, 12.0), "cfar_pfa": (1e-6, 1e-5)}
    for text, expect in ((BAD, "cfar_pfa = 0.9"), ("[processing]\nmax_range_m = 999.0\n", "max_range_m = 999.0"),
                         ("[processing]\nmin_range_m = \n", "")):
        _write(path, text)
        os.utime(path, ns=(2 + w.refused, 2 + w.refused))
        refused = w.refused
        for _ in range(2):
            t += POLL_S
            assert w.poll(t) is None
        deadline = time.monotonic() + 5
        while w.refused == refused and time.monotonic() < deadline:
            assert w.poll(t) is None             # nothing applied; the running settings stay
            time.sleep(0.01)
        assert w.refused == refused + 1
        assert expect in w.last_error
    assert w.current.min_range_m == 12.0 and w.applied == 1 and len(proc.built) == 1 and len(proc.used) == 1
    assert w.epoch == 1   # refusals leave the running epoch


def test_serve_applies_a_changed_settings_file_at_the_next_frame(tmp_path, sensor, frames):
    path = tmp_path / "live.toml"
    _write(path, NEAR)
    near, far = Pipeline(sensor, load_settings(path)), None
    _write(path, FAR)
    far = Pipeline(sensor, load_settings(path))
    _write(path, NEAR)
    frame = frames[3]
    ref = {name: p.process(to_canonical(sensor, frame)).copy() for name, p in (("near", near), ("far", far))}
    assert len(ref["near"]) > len(ref["far"]) > 0 and ref["near"]["range_m"].min() < 12.0   # the gate matters
    pub = AdcPublisher(sensor, "tcp://127.0.0.1:*")
    try:
        with running_service(sensor, pub.endpoint, queue_depth=8, rdmap_max_hz=0.0,
                             watch_settings=str(path), health_interval_s=0.2) as svc:
            col = Collector(svc.pub_endpoint, prefix=b"yard-a/")
            try:
                connected(col)
                assert pub.wait_for_subscribers(1, 10, threading.Event())

                def send_until(count):
                    deadline = time.monotonic() + 20
                    while len(col.of("points")) < count and time.monotonic() < deadline:
                        pub.send(frame, 0.0)
                        time.sleep(0.05)

                send_until(3)
                first = col.of("points")[-1]
                _write(path, FAR)
                assert wait_until(lambda: svc._tuner.applied == 1, 20), svc._tuner.last_error
                n = len(col.of("points"))
                send_until(n + 3)
                after = col.of("points")[-1]
                _write(path, BAD)
                assert wait_until(lambda: svc._tuner.refused == 1, 20)
                n = len(col.of("points"))
                send_until(n + 3)
                still = col.of("points")[-1]
                assert col.wait_for(lambda c: any(h.header.get("settings_refused") == 1 for h in c.of("health")), 5)
                health = [h.header for h in col.of("health")][-1]
            finally:
                col.close()
    finally:
        pub.close()
    assert first.data.tobytes() == to_records(ref["near"], first.seq, first.timestamp_s).tobytes()
    assert after.data.tobytes() == to_records(ref["far"], after.seq, after.timestamp_s).tobytes()
    assert still.data.tobytes() == to_records(ref["far"], still.seq, still.timestamp_s).tobytes()   # kept
    assert np.all(after.data["range_m"] >= 12.0)
    assert health["settings_applied"] == 1 and health["settings_refused"] == 1
    assert "cfar_pfa = 0.9" in health["settings_error"]


def test_watch_needs_a_file_and_takes_workers(sensor):
    import pytest

    from cubecast.daemon.processors import PoolProcessor
    from cubecast.daemon.service import Service, serve
    with pytest.raises(CubecastError, match="--watch-settings: give the file"):
        serve("unused.toml", "tcp://127.0.0.1:1", "tcp://127.0.0.1:*", watch_settings=True)
    # with workers too (tests/test_tune_workers.py runs it): the watch goes to the pool's processor
    svc = Service(sensor, "tcp://127.0.0.1:1", "tcp://127.0.0.1:*", workers=1, watch_settings="x.toml")
    assert isinstance(svc.processor, PoolProcessor) and svc._tuner.watch.path == "x.toml"
    assert svc._tuner.processor is svc.processor
