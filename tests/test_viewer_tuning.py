"""The viewer's tuning keys (view --control, viewer/tuning.py): the key -> request mapping as a pure
function, the background client against a real serve's control endpoint over 127.0.0.1 (bounded
waits), and the key pressed in the window (offscreen) showing serve's answer in the footer.

Expected values are worked by hand from the settings' definitions (Pfa a probability stepped by
decades; guard and training cells whole numbers; the four CFAR kinds); the change serve applies is
checked against the points of a chain built directly with the new settings."""

from __future__ import annotations

import time

import pytest
import zmq

from cubecast.daemon.settings import CFAR_KINDS, ProcessingSettings
from cubecast.daemon.control import settings_map
from cubecast.viewer import tuning
from cubecast.viewer.tuning import TUNING_KEYS, TuningClient, change_for_key, check_reply, describe_reply
from tests.test_control import Feeder, matches, points_from, references, serve_with_control
from tests.test_viewer_render import FakeFeed, canvas  # noqa: F401
from tests.test_workers import frames, sensor  # noqa: F401

DEFAULTS = settings_map(ProcessingSettings())   # what a `get` reply's settings map holds


def test_key_to_request_mapping():
    s = dict(DEFAULTS, cfar_pfa=1e-6, cfar_kind="os", cfar_guard_range=3, cfar_guard_doppler=2,
             cfar_train_range=8, cfar_train_doppler=4)
    # decades of the false-alarm probability, written as the literals a person would type
    assert change_for_key("f", s) == {"cfar_pfa": 1e-7}
    assert change_for_key("F", s) == {"cfar_pfa": 1e-5}
    assert change_for_key("F", dict(s, cfar_pfa=0.01)) == {"cfar_pfa": 0.1}
    assert change_for_key("F", dict(s, cfar_pfa=0.1)) == {"cfar_pfa": 1.0}   # serve refuses it, with its rule
    assert change_for_key("f", dict(s, cfar_pfa=3e-4)) == {"cfar_pfa": 3e-5}
    # the CFAR kinds in the settings' order, both ways round, wrapping
    assert change_for_key("k", s) == {"cfar_kind": "go"} and change_for_key("K", s) == {"cfar_kind": "ca"}
    assert change_for_key("k", dict(s, cfar_kind="so")) == {"cfar_kind": "ca"}
    assert change_for_key("K", dict(s, cfar_kind="ca")) == {"cfar_kind": "so"}
    assert tuning.CFAR_KINDS == CFAR_KINDS   # the viewer's copy of the names serve's settings take
    kinds, k = [], "ca"
    for _ in range(4):
        k = change_for_key("k", dict(s, cfar_kind=k))["cfar_kind"]
        kinds.append(k)
    assert sorted(kinds) == sorted(CFAR_KINDS) and kinds[-1] == "ca"
    # cells, range and Doppler together
    assert change_for_key("g", s) == {"cfar_guard_range": 2, "cfar_guard_doppler": 1}
    assert change_for_key("G", s) == {"cfar_guard_range": 4, "cfar_guard_doppler": 3}
    assert change_for_key("t", s) == {"cfar_train_range": 7, "cfar_train_doppler": 3}
    assert change_for_key("T", s) == {"cfar_train_range": 9, "cfar_train_doppler": 5}
    # no tuning key, or settings without its fields: no request
    for key in ("c", "n", "p", "q", " ", "Right", "x", ""):
        assert change_for_key(key, s) is None
    assert change_for_key("f", {}) is None and change_for_key("g", {"cfar_guard_range": 1}) is None
    assert all(change_for_key(key, s) for key in TUNING_KEYS)
    assert {k for row, _ in tuning.HELP_ROWS for k in row.split(" / ")} == set(TUNING_KEYS)


def test_replies_to_notices():
    assert describe_reply({"ok": True, "epoch": 3, "changed": {"cfar_pfa": [1e-6, 1e-5]}}) == \
        "tuning applied (settings epoch 3): cfar_pfa 1e-06 -> 1e-05"
    assert describe_reply({"ok": True, "epoch": 3, "changed": {}}) == "tuning: nothing changed (settings epoch 3)"
    text = describe_reply({"ok": False, "reason": "invalid", "error": "x" * 500})
    assert text.startswith("tuning refused (invalid): xxx") and len(text) == tuning.MAX_NOTICE_CHARS
    import msgpack
    for bad in (b"\xc1", msgpack.packb([1]), msgpack.packb({"ok": 1, "settings": {}}),
                msgpack.packb({"ok": True, "settings": {}, "changed": {"a": 1}})):
        with pytest.raises(ValueError):
            check_reply(bad)


def wait_notice(client, words: str, timeout_s: float = 30.0) -> list:
    seen = []
    deadline = time.monotonic() + timeout_s
    while time.monotonic() < deadline:
        n = client.take_notice()
        if n:
            seen.append(n)
            if words in n:
                return seen
        time.sleep(0.01)
    raise AssertionError(f"no notice with {words!r} within {timeout_s} s; saw {seen}")


def test_keys_change_a_running_serve(sensor, frames):
    new = dict(cfar_pfa=1e-5, cfar_guard_doppler=0)
    ref = references(sensor, frames, **new)
    with serve_with_control(sensor, settings=ProcessingSettings(cfar_guard_doppler=0)) as (svc, pub, col):
        client = TuningClient(svc.control_endpoint).start()
        try:
            assert not client.press("c") and client.press("F")
            seen = wait_notice(client, "tuning applied")
            assert seen[-1] == "tuning applied (settings epoch 1): cfar_pfa 1e-06 -> 1e-05"
            with Feeder(pub, frames) as feed:
                after = points_from(col, feed.seq, 3)
            # past a bound, serve's refusal and its reason reach the status line; nothing changes
            assert client.press("g")
            refused = wait_notice(client, "tuning refused")[-1]
            assert "refused (invalid)" in refused and "cfar_guard_doppler = -1: must be at least 0" in refused
            assert svc._tuner.current == ProcessingSettings(**new) and svc._tuner.epoch == 1
        finally:
            client.stop()
    assert after and all(matches(m, ref) for m in after)


def test_no_answer_is_said_not_waited_for():
    with zmq.Context() as ctx:
        s = ctx.socket(zmq.ROUTER)
        port = s.bind_to_random_port("tcp://127.0.0.1")
        s.close(0)   # a port nobody answers on
    client = TuningClient(f"tcp://127.0.0.1:{port}", get_timeout_s=0.3).start()
    try:
        assert client.press("k")
        assert f"no answer from tcp://127.0.0.1:{port} within 0.3 s" in wait_notice(client, "no answer", 10)[-1]
    finally:
        client.stop()
    assert client._thread is None


def test_a_tuning_key_in_the_window_shows_serves_answer(sensor, canvas):  # noqa: F811
    from cubecast.viewer.app import ViewerApp
    with serve_with_control(sensor) as (svc, _, _):
        client = TuningClient(svc.control_endpoint).start()
        app = ViewerApp(FakeFeed(), canvas=canvas, show=False, tuning=client)
        try:
            app.handle_key("", "k")
            assert canvas.footer_text.text == f"tuning: key k sent to {svc.control_endpoint}"
            deadline = time.monotonic() + 30
            while "tuning applied" not in canvas.footer_text.text and time.monotonic() < deadline:
                app.tick()
                time.sleep(0.02)
            assert canvas.footer_text.text == "tuning applied (settings epoch 1): cfar_kind os -> go"
            assert svc._tuner.current.cfar_kind == "go"
            app.handle_key("", "c")   # the viewer's own keys stay its own
            assert svc._tuner.epoch == 1 and client.sent == 1
        finally:
            client.stop()
