"""Keys on the data path (ZeroMQ CURVE), over real sockets on 127.0.0.1 with bounded waits: a keyed replay
feeds a keyed serve; subscribers with the right keys (a plain SUB, the viewer's feed, record) get the
ADC frames and the points byte for byte as the capture and the single-process chain give them (which
the unkeyed stream carries too: tests/test_service.py, tests/test_sources.py); no key, an unknown key
and a wrong server key get nothing and the bound side counts each refused handshake; a key added to
the folder while running is accepted without a restart; binding beyond loopback without keys needs
--insecure; flag errors name the flag and the file.

Protocol facts used (common practice, from ZeroMQ's CURVE mechanism, RFC 26/CurveZMQ and
zmq_curve(7), from memory): a CURVE server refuses a client of another mechanism or one that does not
know its public key during the handshake, and asks its ZAP handler about the client's public key
before any message flows. Loopback addresses: 127.0.0.0/8 and ::1 (IETF RFC 6890, 2013)."""

from __future__ import annotations

import logging
import shutil
import threading
import time
import traceback

import pytest
import zmq

from cubecast.daemon.capture import CaptureReader
from cubecast.daemon.cli import main as cli_main
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.keys import ClientKeys, ServerKeys, create_keys, load_public_key, load_secret_key
from cubecast.daemon.netio import check_exposure, host_only
from cubecast.daemon.service import Service
from cubecast.daemon.sources import ReplaySource
from cubecast.daemon.wire import WireError, decode
from cubecast.viewer.feed import Feed
from cubecast.viewer.keyfiles import KeyFileError, load_feed_keys
from tests.helpers import SAMPLES
from tests.test_service import run_in_thread, wait_until
from tests.test_workers import YARD, YARD_SENSOR, frames, ref_points, reference_bytes, sensor  # noqa: F401

QUIET_S = 2.0  # how long a refused subscriber listens: serve sends ~20 clouds, 2 health and a sensor in it


@pytest.fixture(scope="module")
def keyring(tmp_path_factory):
    """Key pairs of the source, serve, a tracker and a stranger; each bound side's folder of accepted keys."""
    d = tmp_path_factory.mktemp("keys")
    for name in ("source", "serve", "tracker", "stranger"):
        create_keys(name, d / name)
    (d / "source-accepts").mkdir()
    (d / "serve-accepts").mkdir()
    for folder, names in (("source-accepts", ("serve", "tracker")), ("serve-accepts", ("tracker",))):
        for n in names:
            shutil.copy(d / n / f"{n}.key", d / folder / f"{n}.key")
    return d


def _client(keyring, server: str, me: str, server_dir: str | None = None) -> ClientKeys:
    return ClientKeys.from_files(keyring / (server_dir or server) / f"{server}.key", keyring / me / f"{me}.key_secret")


@pytest.fixture(scope="module")
def chain(keyring, sensor):
    """replay (keys: accepts serve and the tracker) -> serve (keys on both sides: accepts the tracker)."""
    src = ReplaySource(YARD, "tcp://127.0.0.1:*", speed=1.0, loop=True, wait_s=60,
                       keys=ServerKeys(keyring / "source" / "source.key_secret", keyring / "source-accepts",
                                       clients="subscriber"))
    src.bind()
    stop_src = threading.Event()
    t_src = threading.Thread(target=src.run, args=(stop_src,), daemon=True)
    t_src.start()
    svc = Service(sensor, src.endpoint, "tcp://127.0.0.1:*", queue_depth=64,
                  pub_keys=ServerKeys(keyring / "serve" / "serve.key_secret", keyring / "serve-accepts",
                                      clients="subscriber"),
                  source_keys=[_client(keyring, "source", "serve")])
    t_svc, stop_svc, errors = run_in_thread(svc)
    assert wait_until(lambda: svc.ready.is_set() or errors, 90) and not errors, [
        "".join(traceback.format_exception(e)) for e in errors]
    try:
        yield src, svc
    finally:
        stop_svc.set()
        t_svc.join(5)
        stop_src.set()
        t_src.join(5)
    assert not t_svc.is_alive() and not t_src.is_alive() and not errors, errors


def collect(endpoint: str, keys, want: int, timeout_s: float, prefix: bytes = b"") -> list:
    """Connect a plain SUB (with keys, or none) and return the decoded messages of `want` (or what came
    within timeout_s)."""
    ctx = zmq.Context()
    sock = ctx.socket(zmq.SUB)
    sock.setsockopt(zmq.LINGER, 0)
    sock.setsockopt(zmq.SUBSCRIBE, prefix)
    if keys is not None:
        keys.apply(sock)
    sock.connect(endpoint)
    out = []
    deadline = time.monotonic() + timeout_s
    try:
        while len(out) < want and time.monotonic() < deadline:
            if sock.poll(50):
                try:
                    out.append(decode(sock.recv_multipart(copy=False)))
                except WireError as exc:
                    raise AssertionError(f"a keyed stream carried a bad message: {exc}") from None
    finally:
        sock.close(0)
        ctx.term()
    return out


# ---- the right keys -------------------------------------------------------------------------------

def test_right_keys_get_points_and_frames_byte_for_byte(chain, keyring, frames, ref_points):
    src, svc = chain
    points = collect(svc.pub_endpoint, _client(keyring, "serve", "tracker"), 10, 30, b"yard-a/points")
    assert len(points) == 10
    for m in points:  # the single-process chain's records of the same frame, byte for byte
        assert m.data.tobytes() == reference_bytes(ref_points, m.seq, m.timestamp_s)
    adc = collect(src.endpoint, _client(keyring, "source", "tracker"), 5, 30)
    assert len(adc) == 5
    for m in adc:  # the capture's frames, exactly
        assert m.kind == "adc" and m.payload.tobytes() == frames[m.seq % len(frames)].tobytes()
    s = svc.stats()
    assert s["source_handshakes_failed"] == 0 and s["frames_rejected"] == 0


def test_viewer_feed_with_keys_gets_the_stream(chain, keyring, ref_points):
    _, svc = chain
    keys = load_feed_keys(keyring / "serve" / "serve.key", keyring / "tracker" / "tracker.key_secret")
    with Feed(svc.pub_endpoint, keys=keys) as feed:
        assert wait_until(lambda: {"points", "sensor", "health"} <= set(feed.snapshot().latest.get("yard-a", {})),
                          15), feed.snapshot()
        snap = feed.snapshot()
    pts = snap.latest["yard-a"]["points"]
    assert pts["data"].tobytes() == reference_bytes(ref_points, pts["header"]["seq"], pts["header"]["timestamp_s"])
    assert snap.bad == 0 and snap.handshakes_failed == 0
    health = snap.latest["yard-a"]["health"]["header"]  # serve's own view of its links
    assert health["source_handshakes_failed"] == 0 and health["source_protocol_errors"] == 0


def test_record_with_keys_from_source_and_serve(chain, keyring, tmp_path, frames):
    src, svc = chain
    code = cli_main(["record", "--sub", src.endpoint, "--sub", svc.pub_endpoint,
                     "--server-key", str(keyring / "source" / "source.key"),
                     "--server-key", str(keyring / "serve" / "serve.key"),
                     "--key", str(keyring / "tracker" / "tracker.key_secret"),
                     "--out", str(tmp_path / "rec.cap"), "--points-out", str(tmp_path / "rec.csv"),
                     "--frames", "4", "--duration", "30"])
    assert code == 0
    with CaptureReader(tmp_path / "rec.cap") as r:
        assert len(r) == 4
        for i in range(4):
            fr = r.read(i)
            assert fr.payload.tobytes() == frames[fr.sequence % len(frames)].tobytes()
    assert len((tmp_path / "rec.csv").read_text().splitlines()) > 1  # a header and the clouds' points


# ---- the wrong keys -------------------------------------------------------------------------------

CASES = ["no key", "unknown key", "wrong server key"]


def _wrong(keyring, case: str, server: str) -> ClientKeys | None:
    if case == "no key":
        return None
    if case == "unknown key":
        return _client(keyring, server, "stranger")
    return ClientKeys.from_files(keyring / "stranger" / "stranger.key", keyring / "tracker" / "tracker.key_secret")


@pytest.mark.parametrize("case", CASES)
def test_serve_refuses_and_counts(chain, keyring, case):
    _, svc = chain
    before = svc.stats()["subscriber_handshakes_refused"]
    got = collect(svc.pub_endpoint, _wrong(keyring, case, "serve"), 1, QUIET_S)
    assert got == []
    assert wait_until(lambda: svc.stats()["subscriber_handshakes_refused"] > before, 5), svc.stats()


@pytest.mark.parametrize("case", CASES)
def test_replay_refuses_and_counts(chain, keyring, case):
    src, _ = chain
    before = src.publisher.handshakes_refused
    got = collect(src.endpoint, _wrong(keyring, case, "source"), 1, QUIET_S)
    assert got == []
    assert wait_until(lambda: src.publisher.handshakes_refused > before, 5), src.publisher.handshakes_refused


def test_a_key_added_while_serving_is_accepted(chain, keyring, tmp_path):
    _, svc = chain
    create_keys("late", tmp_path)
    shutil.copy(tmp_path / "late.key", keyring / "serve-accepts" / "late.key")  # serve keeps running
    try:
        keys = load_feed_keys(keyring / "serve" / "serve.key", tmp_path / "late.key_secret")
        with Feed(svc.pub_endpoint, keys=keys) as feed:  # a refusal before the folder is read again is redialled
            assert wait_until(lambda: feed.snapshot().counts.get("yard-a", {}).get("points", 0) >= 2, 20), \
                feed.snapshot()
    finally:
        (keyring / "serve-accepts" / "late.key").unlink()


def test_folders_of_two_bound_sockets_in_one_context_stay_apart(keyring, tmp_path):
    """serve's workers and its subscribers share a context (one authenticator): each socket accepts only
    its own folder's keys."""
    shutil.copy(keyring / "serve" / "serve.key", tmp_path / "serve.key")
    ctx = zmq.Context()
    a = ServerKeys(keyring / "serve" / "serve.key_secret", keyring / "serve-accepts", clients="subscriber")
    b = ServerKeys(keyring / "serve" / "serve.key_secret", tmp_path, clients="worker")
    socks = []
    try:
        for keys in (a, b):
            keys.start(ctx)
            s = ctx.socket(zmq.XPUB)
            s.setsockopt(zmq.LINGER, 0)
            keys.apply(s)
            s.bind("tcp://127.0.0.1:*")
            socks.append(s)

        def joins(sock, me: str) -> bool:
            sub = ctx.socket(zmq.SUB)
            sub.setsockopt(zmq.LINGER, 0)
            sub.setsockopt(zmq.SUBSCRIBE, b"")
            _client(keyring, "serve", me).apply(sub)
            sub.connect(sock.getsockopt_string(zmq.LAST_ENDPOINT))
            try:  # a subscription (b"\x01" + topic) arrives only over an accepted connection
                deadline = time.monotonic() + 1.5
                while time.monotonic() < deadline:
                    if sock.poll(50) and sock.recv()[:1] == b"\x01":
                        return True
                return False
            finally:
                sub.close(0)

        # the tracker is in a's folder only; serve's own key ("serve") in b's only
        assert joins(socks[0], "tracker") and not joins(socks[1], "tracker")
        assert joins(socks[1], "serve") and not joins(socks[0], "serve")
        assert a.refused == 1 and b.refused == 1
    finally:
        for s in socks:
            s.close(0)
        a.stop()
        b.stop()
        ctx.term()


# ---- binding beyond loopback, and the flags -------------------------------------------------------

def test_host_only_endpoints():
    for ep in ("tcp://127.0.0.1:5601", "tcp://127.8.9.10:*", "tcp://localhost:1", "tcp://[::1]:5",
               "ipc:///tmp/cubecast.sock", "inproc://x"):
        assert host_only(ep), ep
    for ep in ("tcp://0.0.0.0:5601", "tcp://*:5601", "tcp://[::]:1", "tcp://eth0:1", "tcp://192.168.1.7:1",
               "tcp://radar-pc:1"):
        assert not host_only(ep), ep


def test_exposure_needs_keys_or_insecure(caplog):
    with pytest.raises(CubecastError, match="--insecure") as info:
        check_exposure("tcp://0.0.0.0:5601", "--pub", keyed=False, insecure=False, exposes="the raw ADC frames")
    assert "the raw ADC frames" in str(info.value)
    check_exposure("tcp://0.0.0.0:5601", "--pub", keyed=True, insecure=False, exposes="the raw ADC frames")
    with caplog.at_level(logging.WARNING, logger="cubecast"):
        check_exposure("tcp://0.0.0.0:5601", "--pub", keyed=False, insecure=True, exposes="the raw ADC frames")
    line = [r.getMessage() for r in caplog.records if "insecure" in r.getMessage()]
    assert line and "the raw ADC frames" in line[0] and "neither authenticated nor encrypted" in line[0]


def test_cli_refuses_unkeyed_binds_beyond_loopback_before_binding(capsys):
    assert cli_main(["replay", str(YARD), "--pub", "tcp://0.0.0.0:0"]) == 2
    err = capsys.readouterr().err
    assert "--pub tcp://0.0.0.0:0" in err and "--insecure" in err and "raw ADC frames" in err
    assert cli_main(["serve", "--sensor", str(YARD_SENSOR), "--pub", "tcp://0.0.0.0:0"]) == 2
    err = capsys.readouterr().err
    assert "publish endpoint tcp://0.0.0.0:0" in err and "point clouds" in err and "--insecure" in err
    assert cli_main(["serve", "--sensor", str(YARD_SENSOR), "--tasks", "tcp://0.0.0.0:0", "--results",
                     "tcp://127.0.0.1:0"]) == 2
    assert "--worker-keys" in capsys.readouterr().err


def test_cli_key_flags_come_in_pairs_and_name_the_file(keyring, capsys, caplog):
    sec, pub = str(keyring / "serve" / "serve.key_secret"), str(keyring / "serve" / "serve.key")
    missing = str(keyring / "nowhere.key_secret")
    cases = [
        (["record", "--sub", "tcp://127.0.0.1:1", "--server-key", pub, "--out", "x.cap"], "--server-key and --key"),
        (["record", "--sub", "tcp://127.0.0.1:1", "--sub", "tcp://127.0.0.1:2", "--server-key", pub,
          "--server-key", pub, "--server-key", pub, "--key", sec, "--out", "x.cap"], "3 given for 2 --subs"),
        (["record", "--sub", "tcp://127.0.0.1:1", "--server-key", pub, "--key", missing, "--out", "x.cap"],
         f"--key {missing}: no such key file"),
        (["record", "--sub", "tcp://127.0.0.1:1", "--server-key", pub, "--key", pub, "--out", "x.cap"],
         "holds only a public key"),
        (["replay", str(YARD), "--server-key", sec], "--server-key and --client-keys"),
        (["replay", str(YARD), "--server-key", sec, "--client-keys", str(keyring / "nowhere")],
         "--client-keys " + str(keyring / "nowhere") + ": not a folder"),
        (["serve", "--sensor", str(YARD_SENSOR), "--client-keys", str(keyring / "serve-accepts")],
         "each needs --server-key"),
        (["serve", "--sensor", str(YARD_SENSOR), "--server-key", missing, "--client-keys",
          str(keyring / "serve-accepts")], f"--server-key {missing}: no such key file"),
        (["simulate", str(SAMPLES / "yard_scene.toml"), "--sensor", str(YARD_SENSOR), "--out", "x.cap",
          "--server-key", sec], "only with --pub"),
    ]
    for argv, expect in cases:
        assert cli_main(argv) == 2, argv
        err = capsys.readouterr().err
        assert expect in err, (argv, err)
    # the viewer reads its key files itself (viewer/keyfiles.py) and names the flag too
    with pytest.raises(KeyFileError, match="--key .*serve.key: holds only a public key"):
        load_feed_keys(pub, pub)
    with pytest.raises(KeyFileError, match="--server-key and --key: give both"):
        load_feed_keys(pub, None)
    with caplog.at_level(logging.ERROR, logger="cubecast"):
        assert cli_main(["view", "--sub", "tcp://127.0.0.1:1", "--server-key", pub, "--key", missing]) == 2
    assert any(f"--key {missing}: no such key file" in r.getMessage() for r in caplog.records)


def test_viewer_key_reading_agrees_with_the_daemons(keyring):
    k = load_feed_keys(keyring / "serve" / "serve.key", keyring / "tracker" / "tracker.key_secret")
    assert k.server_public == load_public_key(keyring / "serve" / "serve.key")
    assert (k.public, k.secret) == load_secret_key(keyring / "tracker" / "tracker.key_secret")


def test_adapter_publisher_takes_the_commands_keys(keyring, sensor, tmp_path, capsys):
    """The adapter's publisher is made inside the command: --server-key / --client-keys / --insecure reach
    it through netio.publisher_security (what cli.py wraps the adapter's command in)."""
    from cubecast.daemon.adapter import StreamAdapter
    from cubecast.daemon.netio import publisher_security
    from cubecast.daemon.streamlayout import load_layout
    dgram = tmp_path / "empty.dgram"
    dgram.write_bytes(b"")
    layout = load_layout(str(SAMPLES / "example_layout.toml"))
    keys = ServerKeys(keyring / "source" / "source.key_secret", keyring / "source-accepts", clients="subscriber")
    with publisher_security(keys, False):
        a = StreamAdapter(layout, sensor, "tcp://127.0.0.1:*", file=dgram)
        ep = a.bind()
    try:
        assert a.publisher.keys is keys
        assert collect(ep, None, 1, 1.0) == []  # nothing is published, and an unkeyed subscriber is refused
        assert wait_until(lambda: a.publisher.poll_subscriptions() >= 0 and a.publisher.handshakes_refused >= 1, 5)
    finally:
        a.publisher.close()
    assert cli_main(["adapter", "--file", str(dgram), "--layout", str(SAMPLES / "example_layout.toml"), "--sensor",
                     str(YARD_SENSOR), "--pub", "tcp://0.0.0.0:0"]) == 2
    assert "--insecure" in capsys.readouterr().err
