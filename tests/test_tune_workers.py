"""Live tuning with workers (serve --workers N --control), over real sockets on 127.0.0.1 with bounded
waits: a change applies to every worker and no frame is published with settings other than the old
or the new, the old ones strictly before the new ones in frame order; a worker that cannot build the
new chain (or cannot follow a change at all) makes serve refuse the change whole, every worker keeping
the running settings; a worker that joins later is welcomed with the settings of then.

The reference for every point cloud is the single-process chain built directly with each settings
(Pipeline on the same frames), as throughout tests/test_workers.py."""

from __future__ import annotations

import contextlib
import os
import socket
import threading

import msgpack
import pytest

from cubecast.daemon.errors import CubecastError
from cubecast.daemon.settings import ProcessingSettings
from cubecast.daemon.worker import Worker
from tests.test_control import (NEW, Feeder, assert_old_then_new, ask, matches, points_from, references,
                                serve_with_control)
from tests.test_service import wait_until
from tests.test_workers import frames, sensor, serving  # noqa: F401

TIMEOUT_S = 60.0   # a change with workers: serve builds the chain, then every worker does


@pytest.fixture(scope="module")
def refs(sensor, frames):
    r = {"old": references(sensor, frames), "new": references(sensor, frames, **NEW),
         "go": references(sensor, frames, cfar_kind="go")}
    for k in ("new", "go"):   # each change shows in the points of these frames
        assert any(a.tobytes() != b.tobytes() for a, b in zip(r["old"], r[k])), k
    return r


def workers_with_control(sensor, **kw):
    return serve_with_control(sensor, runner=serving, **kw)


@contextlib.contextmanager
def worker_thread(svc, worker_cls=Worker, name="extra"):
    pool = svc.processor.pool
    w = worker_cls(pool.tasks_endpoint, pool.results_endpoint, name=name, check_crc=False)
    stop = threading.Event()
    errors = []

    def run():
        try:
            w.run(stop)
        except BaseException as exc:
            errors.append(exc)

    t = threading.Thread(target=run, daemon=True)
    t.start()
    try:
        assert w.ready.wait(60), f"worker {name} not ready"
        yield w
    finally:
        stop.set()
        t.join(5)
        assert not t.is_alive() and not errors, errors


class PickyWorker(Worker):
    """A worker whose chain cannot be built for CFAR kind 'go' (as a host short of memory might fail)."""

    def build_pipeline(self, config):
        if config.settings.cfar_kind == "go":
            raise CubecastError("this host cannot build a GO-CFAR chain")
        return super().build_pipeline(config)


class OlderWorker(Worker):
    """A worker of a cubecast that predates live settings: its hello has no live_settings field."""

    def _hello(self, dealer):
        return self._send(dealer, [b"hello", msgpack.packb({
            "proto": 1, "worker": self.key, "name": self.name, "pid": os.getpid(),
            "host": socket.gethostname()[:255], "capacity": self.capacity, "expect_digest": None})])


def alive(svc) -> int:
    return svc.stats()["workers_alive"]


def done_by(svc) -> dict:
    return {r["name"]: r["tasks_done"] for r in svc.stats()["workers"]}


def test_a_change_applies_to_every_worker_and_no_frame_mixes_settings(sensor, frames, refs):
    with workers_with_control(sensor, workers=2) as (svc, pub, col):
        ep = svc.control_endpoint
        with Feeder(pub, frames) as feed:
            points_from(col, 0, 6)
            reply = ask(ep, {"op": "set", "settings": NEW}, timeout_s=TIMEOUT_S)
            assert reply is not None and reply["ok"], reply
            switched_by, at_switch = feed.seq, done_by(svc)
            after = points_from(col, switched_by, 8)
            assert wait_until(lambda: all(done_by(svc)[n] > at_switch[n] for n in at_switch), 20), done_by(svc)
            assert col.wait_for(lambda c: any(h.header.get("settings_epoch") == 1 for h in c.of("health")), 5)
        health = [h.header for h in col.of("health")][-1]
        stats = svc.stats()
    assert reply["epoch"] == 1 and reply["changed"]["cfar_kind"] == ["os", "ca"]
    assert after and all(matches(m, refs["new"]) for m in after)
    assert_old_then_new(col.of("points"), refs)
    assert health["workers_alive"] == 2 and health["settings_applied"] == 1 and health["processing_errors"] == 0
    assert stats["worker_results_invalid"] == 0   # no result of another epoch than its task's


def test_a_worker_that_cannot_build_refuses_the_change_for_all(sensor, frames, refs):
    with workers_with_control(sensor, workers=1, tasks_endpoint="tcp://127.0.0.1:*",
                              results_endpoint="tcp://127.0.0.1:*") as (svc, pub, col):
        ep = svc.control_endpoint
        with worker_thread(svc, PickyWorker, "picky") as picky, Feeder(pub, frames) as feed:
            with worker_thread(svc, OlderWorker, "older"):
                assert wait_until(lambda: alive(svc) == 3, 20), svc.stats()["workers"]
                points_from(col, 0, 4)
                # a worker that cannot follow a change at all: refused at once, naming it
                older = ask(ep, {"op": "set", "settings": NEW}, timeout_s=TIMEOUT_S)
            assert wait_until(lambda: alive(svc) == 2, 20)   # the older worker stopped (bye)
            refused = ask(ep, {"op": "set", "settings": {"cfar_kind": "go"}}, timeout_s=TIMEOUT_S)
            kept_from = feed.seq
            kept = points_from(col, kept_from, 6)
            assert wait_until(lambda: picky._prepared is None, 10)   # it dropped what it built
            assert picky.epoch == 0
            # the cluster is not stuck half-way: the next change applies everywhere
            reply = ask(ep, {"op": "set", "settings": NEW}, timeout_s=TIMEOUT_S)
            switched_by, at_switch = feed.seq, done_by(svc)
            after = points_from(col, switched_by, 8)
            assert wait_until(lambda: all(done_by(svc)[n] > at_switch[n] for n in ("picky", "local-0")), 20)
            # a worker joining now is welcomed with the settings of now
            with worker_thread(svc, Worker, "newcomer") as newcomer:
                late = (newcomer.config.settings, newcomer.epoch)
            assert (picky.epoch, picky.changes, picky.config.settings) == (3, 1, ProcessingSettings(**NEW))
        health = [h.header for h in col.of("health")][-1]
    assert older is not None and not older["ok"] and older["reason"] == "refused" and older["epoch"] == 0
    assert f"worker 'older' (on {socket.gethostname()[:255]}) is a cubecast that cannot change settings while it " \
        "runs" in older["error"]
    assert refused is not None and not refused["ok"] and refused["reason"] == "refused" and refused["epoch"] == 0
    assert (f"worker 'picky' (on {socket.gethostname()[:255]}) cannot build the chain: this host cannot build a "
            "GO-CFAR chain") == refused["error"]
    assert refused["settings"]["cfar_kind"] == "os"
    assert kept and all(matches(m, refs["old"]) for m in kept)
    assert not any(matches(m, refs["go"]) and not matches(m, refs["old"]) for m in col.of("points"))
    assert reply["ok"] and reply["epoch"] == 3, reply   # epochs 1 and 2 were used up by the refused changes
    assert after and all(matches(m, refs["new"]) for m in after)
    assert_old_then_new(col.of("points"), refs)
    assert late == (ProcessingSettings(**NEW), 3)
    assert health["settings_refused"] == 2 and health["settings_applied"] == 1 and health["settings_epoch"] == 3


class SilentWorker(Worker):
    """A worker that never answers a settings change (it keeps processing and beating)."""

    def _prepare(self, parts):
        pass


def test_a_worker_that_does_not_answer_in_time_refuses_the_change(sensor, frames, refs):
    with workers_with_control(sensor, workers=1, tasks_endpoint="tcp://127.0.0.1:*",
                              results_endpoint="tcp://127.0.0.1:*") as (svc, pub, col):
        svc.processor.change_timeout_s = 1.5
        with worker_thread(svc, SilentWorker, "silent"), Feeder(pub, frames) as feed:
            assert wait_until(lambda: alive(svc) == 2, 20)
            reply = ask(svc.control_endpoint, {"op": "set", "settings": NEW}, timeout_s=TIMEOUT_S)
            kept = points_from(col, feed.seq, 6)
            assert wait_until(lambda: done_by(svc)["silent"] > 0 and alive(svc) == 2, 20)
    assert reply is not None and not reply["ok"] and reply["reason"] == "refused" and reply["epoch"] == 0
    assert "worker 'silent' did not answer the settings change within 1.5 s" in reply["error"]
    assert kept and all(matches(m, refs["old"]) for m in kept)
    assert not any(matches(m, refs["new"]) and not matches(m, refs["old"]) for m in col.of("points"))
