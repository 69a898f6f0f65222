"""serve's control endpoint (serve --control) and `cubecast tune`, over real sockets on 127.0.0.1 with
free ports and bounded waits: a `set` changes the published points exactly as a chain built directly
with those settings computes them (Pipeline on the same frames, as the single-process reference of
tests/test_settings_watch.py); a refused change keeps the running settings and names the reason;
malformed requests get a clear error reply and disturb nothing; keys are required when given; the
tune command as a subprocess.

The reference for every point cloud is Pipeline(sensor, ProcessingSettings(...)) constructed from the
same fields in this test, never what serve reports about itself."""

from __future__ import annotations

import contextlib
import json
import os
import subprocess
import sys
import threading
import time
import tomllib

import msgpack
import pytest
import zmq

from cubecast.daemon.chain.pipeline import Pipeline
from cubecast.daemon.chain.points import to_records
from cubecast.daemon.control import (MAX_PART_BYTES, MAX_REQUEST_BYTES, ControlEndpoint, ControlError,
                                     decode_request, merge_settings, request, settings_map, settings_toml)
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.files import to_canonical
from cubecast.daemon.keys import ClientKeys, ServerKeys, create_keys
from cubecast.daemon.processors import Change
from cubecast.daemon.retune import Tuner
from cubecast.daemon.service import Service
from cubecast.daemon.settings import ProcessingSettings, parse_settings
from cubecast.daemon.sources import AdcPublisher
from tests.test_service import Collector, connected, running_service, wait_until
from tests.test_workers import REPO, frames, sensor  # noqa: F401

TIMEOUT_S = 10.0   # every reply of serve is awaited at most this long (a set: the chain is built first)
NEW = dict(cfar_kind="ca", cfar_pfa=1e-5, min_range_m=12.0)


def raw_request(endpoint: str, parts: list, timeout_s: float = TIMEOUT_S, kind=zmq.REQ, keys=None) -> dict | None:
    """Send `parts` as they are; the reply as a map (msgpack), or None when none came within timeout_s."""
    ctx = zmq.Context.instance()
    sock = ctx.socket(kind)
    try:
        sock.setsockopt(zmq.LINGER, 0)
        if keys is not None:
            keys.apply(sock)
        sock.connect(endpoint)
        sock.send_multipart(parts)
        if not sock.poll(int(timeout_s * 1000)):
            return None
        return msgpack.unpackb(sock.recv_multipart()[-1])
    finally:
        sock.close(0)


def ask(endpoint: str, body: dict, **kw) -> dict | None:
    return raw_request(endpoint, [msgpack.packb(body)], **kw)


class Feeder:
    """Publishes the capture's frames in turn (~20 a second) from its own thread until stopped."""

    def __init__(self, pub: AdcPublisher, frames):
        self.pub, self.frames = pub, frames
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _run(self):
        while not self._stop.is_set():
            seq = self.pub.seq
            self.pub.send(self.frames[seq % len(self.frames)].copy(), 0.05 * seq)
            self._stop.wait(0.05)

    @property
    def seq(self) -> int:
        return self.pub.seq

    def __enter__(self):
        self._thread.start()
        return self

    def __exit__(self, *exc):
        self._stop.set()
        self._thread.join(5)


def references(sensor, frames, **fields) -> list:
    """The single-process chain built with these settings, on every frame."""
    p = Pipeline(sensor, ProcessingSettings(**fields))
    return [p.process(to_canonical(sensor, f)).copy() for f in frames]


def matches(m, ref) -> bool:
    return m.data.tobytes() == to_records(ref[m.seq % len(ref)], m.seq, m.timestamp_s).tobytes()


def assert_old_then_new(points, refs) -> None:
    """Every cloud is the old chain's or the new chain's, and in frame order the old ones come first
    (a frame both chains compute alike says nothing about the switch and is left out of the order)."""
    kinds = []
    for m in sorted(points, key=lambda m: m.seq):
        old, new = matches(m, refs["old"]), matches(m, refs["new"])
        assert old or new, f"frame {m.seq}: neither the old nor the new settings' points"
        if old != new:
            kinds.append("new" if new else "old")
    assert "old" in kinds and "new" in kinds and kinds == sorted(kinds, key=lambda k: k == "new"), kinds


@pytest.fixture(scope="module")
def refs(sensor, frames):
    old, new = references(sensor, frames), references(sensor, frames, **NEW)
    # the change matters on these frames: the range gate removes points, and no frame is empty both ways
    assert sum(len(a) for a in old) > sum(len(b) for b in new) > 0
    assert any(a.tobytes() != b.tobytes() for a, b in zip(old, new))
    return {"old": old, "new": new}


@contextlib.contextmanager
def serve_with_control(sensor, runner=running_service, **kw):
    """A source, a serve with a control endpoint (run by `runner`: running_service, or test_workers'
    serving for one with workers) and a collector of its points."""
    pub = AdcPublisher(sensor, "tcp://127.0.0.1:*")
    try:
        with runner(sensor, pub.endpoint, queue_depth=8, rdmap_max_hz=0.0, health_interval_s=0.2,
                             control_endpoint="tcp://127.0.0.1:*", **kw) as svc:
            col = Collector(svc.pub_endpoint, prefix=b"yard-a/")
            try:
                connected(col)
                assert pub.wait_for_subscribers(1, 10, threading.Event())
                yield svc, pub, col
            finally:
                col.close()
    finally:
        pub.close()


def points_from(col, first_seq: int, count: int, timeout_s: float = 20.0) -> list:
    assert col.wait_for(lambda c: len([m for m in c.of("points") if m.seq >= first_seq]) >= count, timeout_s)
    return [m for m in col.of("points") if m.seq >= first_seq]


# ---- pure: requests and the settings they ask for -----------------------------------------------------

def test_requests_are_decoded_bounded_and_checked():
    assert decode_request(msgpack.packb({"op": "get"})).op == "get"
    req = decode_request(msgpack.packb({"op": "set", "settings": {"cfar_pfa": 1e-5}}))
    assert (req.op, req.settings) == ("set", {"cfar_pfa": 1e-5})
    cases = [
        (b"\xc1", "malformed", "not one valid msgpack value"),          # 0xc1 is never used (msgpack spec)
        (b"", "malformed", "msgpack"),
        (msgpack.packb([1, 2]), "malformed", "not a map"),
        (msgpack.packb({"op": 3}), "malformed", "'op' = 3: must be 'get' or 'set'"),
        (msgpack.packb({"op": "put"}), "malformed", "'op' = 'put'"),
        (msgpack.packb({"op": True}), "malformed", "'op'"),
        (msgpack.packb({"op": "set"}), "malformed", "needs 'settings'"),
        (msgpack.packb({"op": "get", "settings": {}}), "malformed", "takes no 'settings'"),
        (msgpack.packb({"op": "set", "settings": "cfar_pfa=1e-5"}), "malformed", "'settings'"),
        (msgpack.packb({"op": "set", "setings": {}}), "malformed", "'setings' is not known"),
        (msgpack.packb({"op": "get", "x": msgpack.ExtType(1, b"x")}), "malformed", "ext"),
        (msgpack.packb({"op": "set", "settings": {f"f{i}": 0 for i in range(2000)}}), "oversized", ""),
        (b"\x81" + msgpack.packb("op") + msgpack.packb("x" * MAX_REQUEST_BYTES), "oversized", "at most"),
    ]
    for data, reason, words in cases:
        with pytest.raises(ControlError) as info:
            decode_request(data)
        assert info.value.reason == reason and words in str(info.value), (data[:20], str(info.value))


def test_a_partial_change_is_validated_exactly_as_a_settings_file():
    # the same fields written into a [processing] section of a file, read by the settings reader
    base = ProcessingSettings()
    good = [{"cfar_pfa": 1e-5}, {"cfar_kind": "so", "cfar_guard_range": 0}, {"min_range_m": 2},
            {"remove_static": True, "angle_max_peaks": 1}]
    bad = [{"cfar_pfa": 0.9}, {"cfar_pfaa": 1e-5}, {"cfar_train_range": 2.5}, {"cfar_kind": "median"},
           {"cfar_pfa": float("nan")}, {"remove_static": 1}, {"max_range_m": 0.2}, {"range_window": 3},
           {"cfar_guard_range": -1}, {"max_points": True}]
    for ch in good:
        text = "[processing]\n" + "".join(f"{k} = {json.dumps(v)}\n" for k, v in ch.items())
        assert merge_settings(base, ch) == parse_settings(text, "x")
    for ch in bad:
        text = "[processing]\n" + "".join(f"{k} = {'nan' if v != v else json.dumps(v)}\n" for k, v in ch.items())
        with pytest.raises(CubecastError) as from_file:
            parse_settings(text, "control request")
        with pytest.raises(CubecastError) as from_request:
            merge_settings(base, ch)
        assert str(from_request.value) == str(from_file.value), ch
    # over the running settings, not the defaults: only the fields named change
    running = ProcessingSettings(cfar_kind="go", min_range_m=3.0)
    assert merge_settings(running, {"cfar_pfa": 1e-4}) == ProcessingSettings(cfar_kind="go", min_range_m=3.0,
                                                                             cfar_pfa=1e-4)
    assert "did you mean cfar_pfa" in str(pytest.raises(CubecastError, merge_settings, base, {"cfar_pfaa": 1}).value)


def test_get_prints_a_settings_file_tomllib_reads_back():
    s = ProcessingSettings(cfar_kind="ca", cfar_pfa=3.5e-7, range_window="kaiser", remove_static=True)
    text = settings_toml(settings_map(s))
    assert tomllib.loads(text) == {"processing": settings_map(s)}   # tomllib: Python's TOML reader
    assert parse_settings(text) == s


class BlockingProcessor:
    """prepare / commit / abort with a build that waits for the test (and refuses cfar_kind 'go')."""

    def __init__(self):
        self.release = threading.Event()
        self.committed, self.aborted = [], []

    def prepare(self, settings, epoch):
        def build():
            assert self.release.wait(10)
            if settings.cfar_kind == "go":
                raise CubecastError("this processor cannot take cfar_kind 'go'")
            return settings
        return Change(settings, epoch, build)

    def commit(self, change):
        self.committed.append(change.epoch)

    def abort(self, change):
        self.aborted.append(change.epoch)


def _settle(tuner, timeout_s=10.0):
    deadline = time.monotonic() + timeout_s
    while tuner.busy and time.monotonic() < deadline:
        tuner.poll()
        time.sleep(0.005)
    assert not tuner.busy


def test_tuner_one_change_at_a_time_busy_refused_and_epochs():
    proc = BlockingProcessor()
    t = Tuner(ProcessingSettings(), proc)
    replies = []
    t.propose(ProcessingSettings(cfar_kind="ca"), "control A", replies.append)
    assert t.busy and t.poll() is None and not replies   # being built: nothing applied yet
    t.propose(ProcessingSettings(cfar_kind="so"), "control B", replies.append)
    assert replies[-1].why == "busy" and "control A" in replies[-1].reason and not replies[-1].applied
    proc.release.set()
    _settle(t)
    assert replies[-1].applied and replies[-1].changed == {"cfar_kind": ("os", "ca")} and replies[-1].epoch == 1
    assert t.current.cfar_kind == "ca" and proc.committed == [1] and t.applied == 1 and t.changed_by == "control A"
    t.propose(ProcessingSettings(cfar_kind="go"), "control C", replies.append)
    _settle(t)
    assert not replies[-1].applied and replies[-1].why == "refused" and "cfar_kind 'go'" in replies[-1].reason
    assert proc.aborted == [2] and t.current.cfar_kind == "ca" and t.epoch == 1 and t.refused == 1
    # a refused change uses its number up; a change that changes nothing is neither built nor counted
    t.propose(ProcessingSettings(cfar_kind="ca"), "control D", replies.append)
    assert replies[-1].applied and replies[-1].changed == {} and not t.busy and t.applied == 1
    t.propose(ProcessingSettings(cfar_kind="so"), "control E", replies.append)
    _settle(t)
    assert replies[-1].applied and t.epoch == 3 and proc.committed == [1, 3]
    assert t.health_fields() == {"settings_applied": 2, "settings_refused": 1, "settings_error": None,
                                 "settings_epoch": 3, "settings_changed_by": "control E"}


def test_control_without_keys_binds_loopback_only(sensor):
    t = Tuner(ProcessingSettings(), BlockingProcessor())
    for ep in ("tcp://0.0.0.0:5605", "tcp://*:5605", "tcp://192.168.1.20:5605"):
        with pytest.raises(CubecastError, match="--insecure does not cover"):
            ControlEndpoint(ep, t)
        with pytest.raises(CubecastError, match="control endpoint"):   # even with --insecure
            Service(sensor, "tcp://127.0.0.1:1", "tcp://127.0.0.1:*", insecure=True, control_endpoint=ep)
    for ep in ("tcp://127.0.0.1:5605", "tcp://[::1]:5605", "ipc:///tmp/cubecast-control"):
        ControlEndpoint(ep, t)


# ---- serve with a control endpoint, end to end ---------------------------------------------------------

def test_set_changes_the_points_exactly_as_a_chain_built_with_those_settings(sensor, frames, refs):
    with serve_with_control(sensor) as (svc, pub, col):
        ep = svc.control_endpoint
        got = ask(ep, {"op": "get"})
        assert got["ok"] and got["epoch"] == 0 and got["settings"] == settings_map(ProcessingSettings())
        with Feeder(pub, frames) as feed:
            before = points_from(col, 0, 3)
            reply = ask(ep, {"op": "set", "settings": NEW})
            switched_by = feed.seq   # every frame published from here on was received after the switch
            assert reply["ok"] and reply["epoch"] == 1 and reply["reason"] is None
            assert reply["changed"] == {"cfar_kind": ["os", "ca"], "cfar_pfa": [1e-6, 1e-5],
                                        "min_range_m": [0.5, 12.0]}
            assert reply["settings"] == settings_map(ProcessingSettings(**NEW))
            after = points_from(col, switched_by, 4)
            # a change the sensor cannot take (a range gate beyond its maximum range) is refused whole
            refused = ask(ep, {"op": "set", "settings": {"max_range_m": 999.0, "cfar_pfa": 1e-3}})
            kept_from = feed.seq
            kept = points_from(col, kept_from, 4)
            invalid = ask(ep, {"op": "set", "settings": {"cfar_pfa": 0.9}})
            assert col.wait_for(lambda c: any(h.header.get("settings_refused") == 2 for h in c.of("health")), 5)
        health = [h.header for h in col.of("health")][-1]
    assert all(matches(m, refs["old"]) for m in before)
    assert after and all(matches(m, refs["new"]) for m in after)
    assert all(m.data["range_m"].min() >= 12.0 for m in after if len(m.data))
    assert not refused["ok"] and refused["reason"] == "refused" and "max_range_m = 999.0" in refused["error"]
    assert refused["epoch"] == 1 and refused["settings"] == settings_map(ProcessingSettings(**NEW))
    assert kept and all(matches(m, refs["new"]) for m in kept)       # the running settings stay
    assert not invalid["ok"] and invalid["reason"] == "invalid"
    assert "cfar_pfa = 0.9: must be between" in invalid["error"]
    # every cloud in frame order is the old chain's until the switch and the new chain's after it
    assert_old_then_new(col.of("points"), refs)
    assert health["settings_applied"] == 1 and health["settings_refused"] == 2 and health["settings_epoch"] == 1
    assert health["settings_changed_by"].startswith("control request from 127.0.0.1")
    assert "cfar_pfa = 0.9" in health["settings_error"] and health["control_requests_invalid"] == 0


def test_malformed_requests_get_a_clear_reply_and_disturb_nothing(sensor, frames, refs):
    big = b"\x81" + msgpack.packb("op") + msgpack.packb("x" * (MAX_REQUEST_BYTES * 3))
    cases = [
        ([b"\xc1"], "malformed", "not one valid msgpack value"),
        ([msgpack.packb([1])], "malformed", "not a map"),
        ([msgpack.packb({"op": 7})], "malformed", "'op' = 7"),
        ([msgpack.packb({"op": "set", "settings": [1, 2]})], "malformed", "'settings'"),
        ([msgpack.packb({"op": "get", "verbose": True})], "malformed", "'verbose' is not known"),
        ([msgpack.packb({"op": "get"}), b"more"], "malformed", "one message part"),
        ([big], "oversized", f"at most {MAX_REQUEST_BYTES}"),
        ([msgpack.packb({"op": "set", "settings": {"cfar_pfaa": 1e-5}})], "invalid", "did you mean cfar_pfa"),
        ([msgpack.packb({"op": "set", "settings": {"cfar_train_range": 2.5}})], "invalid", "must be a whole number"),
        ([msgpack.packb({"op": "set", "settings": {"cfar_kind": 1}})], "invalid", "cfar_kind = 1"),
    ]
    with serve_with_control(sensor) as (svc, pub, col):
        ep = svc.control_endpoint
        with Feeder(pub, frames) as feed:
            points_from(col, 0, 2)
            for parts, reason, words in cases:
                reply = raw_request(ep, parts)
                assert reply is not None and not reply["ok"], parts[0][:20]
                assert reply["reason"] == reason and words in reply["error"], (reply["reason"], reply["error"])
                assert reply["settings"] == settings_map(ProcessingSettings()) and reply["epoch"] == 0
            # a DEALER client (no REQ delimiter) is answered the same way
            dealer = raw_request(ep, [msgpack.packb({"op": "get"})], kind=zmq.DEALER)
            assert dealer["ok"] and dealer["epoch"] == 0
            # a part beyond the socket's limit costs its connection only: no reply, serve goes on
            assert raw_request(ep, [b"\x00" * (MAX_PART_BYTES + 1)], timeout_s=1.5) is None
            assert ask(ep, {"op": "get"})["ok"]
            first = feed.seq
            later = points_from(col, first, 3)
            assert col.wait_for(lambda c: any(h.header.get("control_requests_invalid") == 7 for h in c.of("health")),
                                5)
        health = [h.header for h in col.of("health")][-1]
    assert all(matches(m, refs["old"]) for m in later)   # nothing changed the processing
    assert health["settings_refused"] == 3 and health["settings_applied"] == 0 and health["settings_epoch"] == 0
    assert health["control_requests"] >= len(cases) + 2 and health["processing_errors"] == 0


def test_file_and_control_together(sensor, tmp_path):
    path = tmp_path / "live.toml"
    path.write_text("[processing]\nmin_range_m = 1.0\n", encoding="utf-8")
    with serve_with_control(sensor, watch_settings=str(path), settings=parse_settings(path.read_text())) as (svc, _, _):
        ep = svc.control_endpoint
        assert ask(ep, {"op": "set", "settings": {"cfar_kind": "ca"}})["settings"]["cfar_kind"] == "ca"
        # the file holds the whole section: its change sets every field, cfar_kind back to its default
        tmp = tmp_path / "live.tmp"
        tmp.write_text("[processing]\nmin_range_m = 2.0\n", encoding="utf-8")
        os.replace(tmp, path)
        os.utime(path, ns=(10**9, 10**9))
        assert wait_until(lambda: svc._tuner.applied == 2, 20), svc._tuner.last_error
        got = ask(ep, {"op": "get"})
    assert got["settings"]["cfar_kind"] == "os" and got["settings"]["min_range_m"] == 2.0 and got["epoch"] == 2
    assert got["changed_by"] == f"file {path}"


def test_control_keys_are_required_when_given(sensor, tmp_path):
    for name in ("serve", "tune", "stranger"):
        create_keys(name, tmp_path / name)
    accepts = tmp_path / "accepts"
    accepts.mkdir()
    (accepts / "tune.key").write_bytes((tmp_path / "tune" / "tune.key").read_bytes())
    keys = ServerKeys(tmp_path / "serve" / "serve.key_secret", accepts, clients="controller")
    good = ClientKeys.from_files(tmp_path / "serve" / "serve.key", tmp_path / "tune" / "tune.key_secret")
    stranger = ClientKeys.from_files(tmp_path / "serve" / "serve.key", tmp_path / "stranger" / "stranger.key_secret")
    with serve_with_control(sensor, control_keys=keys) as (svc, _, col):
        ep = svc.control_endpoint
        assert request(ep, {"op": "get"}, TIMEOUT_S, good)["ok"]
        with pytest.raises(CubecastError, match="no answer within 1.5 s"):
            request(ep, {"op": "get"}, 1.5, stranger)
        assert ask(ep, {"op": "get"}, timeout_s=1.5) is None     # no keys at all
        assert col.wait_for(lambda c: any(h.header.get("control_handshakes_refused", 0) >= 2
                                          for h in c.of("health")), 5)
        assert request(ep, {"op": "set", "settings": {"cfar_pfa": 1e-5}}, TIMEOUT_S, good)["epoch"] == 1


# ---- cubecast tune, as a subprocess -----------------------------------------------------------------

def tune_cli(*args, timeout_s=120):
    env = dict(os.environ)
    return subprocess.run([sys.executable, "-m", "cubecast.daemon.cli", "tune", *args], cwd=REPO, env=env,
                          capture_output=True, text=True, timeout=timeout_s)


def test_tune_command(sensor, frames, refs):
    with serve_with_control(sensor) as (svc, pub, col):
        ep = svc.control_endpoint
        r = tune_cli("--control", ep)
        assert r.returncode == 0, r.stderr
        assert tomllib.loads(r.stdout) == {"processing": settings_map(ProcessingSettings())}
        r = tune_cli("--control", ep, "--set", "cfar_kind=ca", "--set", "cfar_pfa=1e-5", "--set", "min_range_m=12")
        assert r.returncode == 0, r.stderr
        assert "applied, settings epoch 1" in r.stdout and 'cfar_kind    "os" -> "ca"' in r.stdout
        assert "cfar_pfa     1e-06 -> 1e-05" in r.stdout
        with Feeder(pub, frames) as feed:
            after = points_from(col, feed.seq, 3)
        r = tune_cli("--control", ep, "--set", "cfar_pfa=0.9", "--json")
        assert r.returncode == 2 and "cfar_pfa = 0.9: must be between 0 and 0.5" in r.stderr
        assert len(r.stderr.strip().splitlines()) == 1
        reply = json.loads(r.stdout)
        assert reply["ok"] is False and reply["reason"] == "invalid" and reply["settings"]["cfar_pfa"] == 1e-5
        r = tune_cli("--control", ep, "--get", "--json")
        assert json.loads(r.stdout)["settings"] == settings_map(ProcessingSettings(**NEW))
        r = tune_cli("--control", ep, "--set", "cfar_pfa")
        assert r.returncode == 2 and "expected NAME=VALUE" in r.stderr
    assert after and all(matches(m, refs["new"]) for m in after)
    # nobody listening: a timeout naming the endpoint
    with zmq.Context() as ctx:
        s = ctx.socket(zmq.ROUTER)
        port = s.bind_to_random_port("tcp://127.0.0.1")
        s.close(0)   # a free port nobody answers on
    r = tune_cli("--control", f"tcp://127.0.0.1:{port}", "--timeout", "0.5")
    assert r.returncode == 2 and f"control endpoint tcp://127.0.0.1:{port}: no answer within 0.5 s" in r.stderr
