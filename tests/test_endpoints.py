"""ZeroMQ endpoint validation (daemon/netio.py endpoint_problem, bind_socket, connect_socket).

The forms are those of the libzmq transport manual pages, zmq_tcp(7), zmq_ipc(7) and zmq_inproc(7)
(from memory: tcp://INTERFACE:PORT to bind, with * for every interface and * for a system-assigned
port; tcp://ADDRESS:PORT to connect, optionally SOURCE;ADDRESS:PORT; ipc://PATH with ipc://* binding a
generated path; inproc://NAME without wildcard). TCP ports are 16-bit (Postel, RFC 793, 1981) and 0 is
no port to connect to; an IPv6 literal goes in brackets (Berners-Lee et al., RFC 3986, 2005, 3.2.2);
a dotted quad has four octets of 0..255 (RFC 791, 1981).
"""

from __future__ import annotations

import pytest
import zmq

from cubecast.daemon.errors import CubecastError
from cubecast.daemon.netio import bind_socket, connect_socket, endpoint_problem

GOOD_BOTH = ["tcp://127.0.0.1:5601", "tcp://localhost:1", "tcp://[::1]:65535", "tcp://10.1.2.3:80",
             "tcp://[fe80::1%eth0]:5601", "tcp://sensor-host.example:5602", "tcp://eth0:5601", "ipc:///tmp/cubecast.sock",
             "inproc://serve-wake"]
GOOD_BIND_ONLY = ["tcp://*:5601", "tcp://127.0.0.1:*", "tcp://*:*", "tcp://0.0.0.0:0", "ipc://*"]
GOOD_CONNECT_ONLY = ["tcp://10.0.0.1:5555;10.0.0.2:5555", "tcp://eth1;192.168.1.1:5555"]

BAD = [  # (endpoint, part of the reason), for bind and connect alike
    ("tcp://127.0.0.1:99999", "1..65535"),
    ("tcp://127.0.0.1:65536", "1..65535"),
    ("tcp://127.0.0.1:-1", "1..65535"),
    ("tcp://127.0.0.1:56o1", "1..65535"),
    ("tcp://127.0.0.1:", "1..65535"),
    ("tcp://127.0.0.1", "tcp://HOST:PORT"),
    ("tcp://:5601", "tcp://HOST:PORT"),
    ("tcp://127.0.0.256:5601", "not an IPv4 address"),
    ("tcp://1.2.3:5601", "not an IPv4 address"),
    ("tcp://::1:5601", "in brackets"),
    ("tcp://[::g]:5601", "not an IPv6 address"),
    ("tcp://[::1:5601", "in brackets"),
    ("tcp://my host:5601", "not an address"),
    ("127.0.0.1:5601", "tcp://HOST:PORT, ipc://PATH or inproc://NAME"),
    ("udp://127.0.0.1:5601", "tcp://HOST:PORT, ipc://PATH or inproc://NAME"),
    ("tcp://127.0.0.1:5601 ", "without spaces"),
    ("ipc://", "needs a path"),
    ("inproc://", "needs a name"),
    ("inproc://*", "not a name"),
]


@pytest.mark.parametrize("endpoint", GOOD_BOTH)
def test_good_endpoints_pass_both_ways(endpoint):
    assert endpoint_problem(endpoint, bind=True) is None
    assert endpoint_problem(endpoint, bind=False) is None


@pytest.mark.parametrize("endpoint", GOOD_BIND_ONLY)
def test_wildcards_only_when_binding(endpoint):
    assert endpoint_problem(endpoint, bind=True) is None
    problem = endpoint_problem(endpoint, bind=False)
    assert problem is not None and ("bound" in problem or "binding" in problem), problem


@pytest.mark.parametrize("endpoint", GOOD_CONNECT_ONLY)
def test_a_source_address_only_when_connecting(endpoint):
    assert endpoint_problem(endpoint, bind=False) is None
    assert endpoint_problem(endpoint, bind=True) is not None


@pytest.mark.parametrize("endpoint,reason", BAD)
def test_bad_endpoints_say_why(endpoint, reason):
    for bind in (True, False):
        problem = endpoint_problem(endpoint, bind)
        assert problem is not None and reason in problem, (bind, problem)


def test_bind_and_connect_refuse_before_zeromq_sees_the_endpoint():
    ctx = zmq.Context()
    try:
        pub, sub = ctx.socket(zmq.PUB), ctx.socket(zmq.SUB)
        with pytest.raises(CubecastError, match=r"^publish endpoint tcp://127\.0\.0\.1:99999: port '99999'"):
            bind_socket(pub, "tcp://127.0.0.1:99999", "publish endpoint")
        assert pub.getsockopt_string(zmq.LAST_ENDPOINT) == ""  # nothing was bound
        with pytest.raises(CubecastError, match=r"^--sub tcp://\*:5601: host \*"):
            connect_socket(sub, "tcp://*:5601", "--sub")
        # a good endpoint still binds and reports the port the system chose for *
        bound = bind_socket(pub, "tcp://127.0.0.1:*", "publish endpoint")
        assert bound.startswith("tcp://127.0.0.1:") and 1 <= int(bound.rsplit(":", 1)[1]) <= 65535
        connect_socket(sub, bound, "--sub")
    finally:
        for s in (pub, sub):
            s.close(linger=0)
        ctx.term()
