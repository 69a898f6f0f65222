"""Keys for the worker endpoints (ZeroMQ CURVE): key files, and serve with workers over real sockets
on 127.0.0.1 (bounded waits): local and remote workers with accepted keys process every frame with
exactly the single-process result; a worker with an unknown key, without keys, or with the wrong
serve key is refused in the handshake and exits with an error that says what to fix."""

from __future__ import annotations

import os
import stat
import subprocess
import sys

import pytest

from cubecast.daemon.cli import main as cli_main
from cubecast.daemon.errors import CubecastError
from cubecast.daemon.keys import ClientKeys, ServerKeys, create_keys, load_public_key, load_secret_key, public_keys_in
from cubecast.daemon.sources import ReplaySource
from tests.test_service import Collector, wait_until
from tests.test_workers import (REPO, YARD, YARD_SENSOR, frames, ref_points, reference_bytes,  # noqa: F401
                                sensor, serving, settled)


@pytest.fixture()
def keyring(tmp_path):
    """serve's key pair, one accepted worker, one stranger."""
    create_keys("serve", tmp_path / "serve")
    create_keys("worker-a", tmp_path / "accepted")
    create_keys("stranger", tmp_path / "elsewhere")
    return tmp_path


def test_key_files(tmp_path):
    public, secret = create_keys("node-1", tmp_path / "k")
    assert public.name == "node-1.key" and secret.name == "node-1.key_secret"
    assert stat.S_IMODE(os.stat(secret).st_mode) == 0o600  # the secret is the owner's only
    pub, sec = load_secret_key(secret)
    assert load_public_key(public) == pub and len(pub) == len(sec) == 40
    assert public_keys_in(tmp_path / "k") == {pub}
    with pytest.raises(CubecastError, match="exists already"):
        create_keys("node-1", tmp_path / "k")
    with pytest.raises(CubecastError, match="NAME"):
        create_keys("../up", tmp_path / "k")
    with pytest.raises(CubecastError, match="holds only a public key"):
        load_secret_key(public)
    junk = tmp_path / "junk.key"
    junk.write_text("hello\n")
    with pytest.raises(CubecastError, match="junk.key: holds no public key"):
        load_public_key(junk)
    with pytest.raises(CubecastError, match="missing.key_secret: no such key file"):
        load_secret_key(tmp_path / "missing.key_secret")
    with pytest.raises(CubecastError, match="not a folder"):
        public_keys_in(tmp_path / "nowhere")


def test_cli_options_come_in_pairs(keyring, capsys):
    assert cli_main(["serve", "--sensor", str(YARD_SENSOR), "--workers", "1", "--server-key",
                     str(keyring / "serve" / "serve.key_secret")]) == 2
    assert "--server-key: give it with --worker-keys" in capsys.readouterr().err
    assert cli_main(["worker", "--connect", "tcp://127.0.0.1:1", "--results", "tcp://127.0.0.1:1", "--key",
                     str(keyring / "accepted" / "worker-a.key_secret")]) == 2
    assert "--server-key and --key" in capsys.readouterr().err
    assert cli_main(["serve", "--sensor", str(YARD_SENSOR), "--server-key", str(keyring / "serve" / "serve.key_secret"),
                     "--worker-keys", str(keyring / "accepted")]) == 2
    assert "only with --workers or --tasks" in capsys.readouterr().err


def _replay_and_match(svc, src, col, ref_points) -> dict:
    """Replay the 20 frames; every one processed, published, and equal to the single-process chain."""
    assert src.run() == 20
    s = settled(svc, 20)
    assert s["frames_processed"] == 20
    assert col.wait_for(lambda c: len(c.of("points")) >= 20, 10)
    for m in col.of("points"):
        assert m.data.tobytes() == reference_bytes(ref_points, m.seq, m.timestamp_s)
    return s


def _server_keys(keyring):
    return ServerKeys(keyring / "serve" / "serve.key_secret", keyring / "accepted")


def test_local_workers_with_keys_give_the_single_process_result(keyring, sensor, ref_points):
    src = ReplaySource(YARD, "tcp://127.0.0.1:*", speed=None, wait_s=30)
    ep = src.bind()
    with serving(sensor, ep, workers=2, queue_depth=64, worker_keys=_server_keys(keyring)) as svc:
        col = Collector(svc.pub_endpoint, prefix=b"yard-a/points")
        try:
            assert wait_until(lambda: svc.stats()["workers_alive"] == 2, 60), svc.stats()
            s = _replay_and_match(svc, src, col, ref_points)
            assert s["frames_lost_worker"] == 0 and s["worker_handshakes_refused"] == 0
        finally:
            col.close()


def _worker(svc, *extra) -> subprocess.Popen:
    pool = svc.processor.pool
    return subprocess.Popen([sys.executable, "-m", "cubecast.daemon.cli", "worker", "--connect", pool.tasks_endpoint,
                             "--results", pool.results_endpoint, "--name", "remote", *extra], cwd=REPO,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def test_remote_worker_with_an_accepted_key_joins(keyring, sensor, ref_points):
    src = ReplaySource(YARD, "tcp://127.0.0.1:*", speed=None, wait_s=30)
    ep = src.bind()
    with serving(sensor, ep, tasks_endpoint="tcp://127.0.0.1:*", results_endpoint="tcp://127.0.0.1:*",
                 queue_depth=64, worker_keys=_server_keys(keyring)) as svc:
        proc = _worker(svc, "--server-key", str(keyring / "serve" / "serve.key"), "--key",
                       str(keyring / "accepted" / "worker-a.key_secret"))
        col = Collector(svc.pub_endpoint, prefix=b"yard-a/points")
        try:
            assert wait_until(lambda: svc.stats()["workers_alive"] == 1 or proc.poll() is not None, 60), \
                proc.stderr.read() if proc.poll() is not None else svc.stats()
            _replay_and_match(svc, src, col, ref_points)
        finally:
            col.close()
            proc.terminate()
            proc.wait(10)


@pytest.mark.parametrize("case", ["unknown key", "no keys", "wrong serve key"])
def test_refused_workers_exit_with_what_to_fix(keyring, sensor, case):
    serve_pub = str(keyring / "serve" / "serve.key")
    args = {"unknown key": ["--server-key", serve_pub, "--key", str(keyring / "elsewhere" / "stranger.key_secret")],
            "no keys": [],
            "wrong serve key": ["--server-key", str(keyring / "elsewhere" / "stranger.key"), "--key",
                                str(keyring / "accepted" / "worker-a.key_secret")]}[case]
    expect = {"unknown key": "refused this worker's key", "no keys": "this worker has no keys: serve requires them",
              "wrong serve key": "--server-key is not serve's public key"}[case]
    with serving(sensor, "tcp://127.0.0.1:1", tasks_endpoint="tcp://127.0.0.1:*",
                 results_endpoint="tcp://127.0.0.1:*", worker_keys=_server_keys(keyring)) as svc:
        proc = _worker(svc, *args)
        try:
            _, err = proc.communicate(timeout=60)
        finally:
            proc.kill()
        assert proc.returncode == 2, err
        assert expect in err, err
        s = svc.stats()
        assert s["workers_alive"] == 0 and s["worker_handshakes_refused"] >= 1


def test_keys_on_the_worker_only_are_refused(keyring, sensor):
    with serving(sensor, "tcp://127.0.0.1:1", tasks_endpoint="tcp://127.0.0.1:*",
                 results_endpoint="tcp://127.0.0.1:*") as svc:
        proc = _worker(svc, "--server-key", str(keyring / "serve" / "serve.key"), "--key",
                       str(keyring / "accepted" / "worker-a.key_secret"))
        try:
            _, err = proc.communicate(timeout=60)
        finally:
            proc.kill()
        assert proc.returncode == 2 and "either serve does not use keys" in err, err


def test_a_key_added_while_serving_is_accepted(keyring, sensor):
    with serving(sensor, "tcp://127.0.0.1:1", tasks_endpoint="tcp://127.0.0.1:*",
                 results_endpoint="tcp://127.0.0.1:*", worker_keys=_server_keys(keyring)) as svc:
        create_keys("late", keyring / "accepted")  # serve reads the folder again for an unknown key
        proc = _worker(svc, "--server-key", str(keyring / "serve" / "serve.key"), "--key",
                       str(keyring / "accepted" / "late.key_secret"))
        try:
            assert wait_until(lambda: svc.stats()["workers_alive"] == 1 or proc.poll() is not None, 60), \
                proc.stderr.read() if proc.poll() is not None else svc.stats()
        finally:
            proc.terminate()
            proc.wait(10)


def test_client_keys_round_trip_through_the_environment(keyring):
    k = ClientKeys.from_files(keyring / "serve" / "serve.key", keyring / "accepted" / "worker-a.key_secret")
    assert ClientKeys.from_env(k.to_env()) == k
    with pytest.raises(CubecastError, match="three keys"):
        ClientKeys.from_env("one two")
