"""The viewer's keys: reading ZeroMQ key files for a daemon that requires them (CURVE).

`cubecast keys NAME` (daemon/keys.py) writes NAME.key (public) and NAME.key_secret (secret) in
ZeroMQ's own key-file format. A viewer or a tracker that subscribes to a keyed daemon needs the
daemon's public key (its NAME.key, flag --server-key) and a key pair of its own (NAME.key_secret,
flag --key) whose public half is in the daemon's --client-keys folder.

The few lines that read a key file are a copy of daemon/keys.py's on purpose: the viewer depends on
the wire format and pyzmq only, never on the rest of the daemon.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path


class KeyFileError(ValueError):
    """A key file that is missing or holds no usable key; the message names the flag and the file."""


@dataclass(frozen=True)
class FeedKeys:
    """The daemon's public key and this subscriber's key pair (Z85 text, 40 characters each)."""

    server_public: bytes
    public: bytes
    secret: bytes

    def apply(self, sock) -> None:
        """Before connect(): the connection is then authenticated and encrypted."""
        import zmq
        sock.setsockopt(zmq.CURVE_SERVERKEY, self.server_public)
        sock.setsockopt(zmq.CURVE_PUBLICKEY, self.public)
        sock.setsockopt(zmq.CURVE_SECRETKEY, self.secret)


def _z85_key(key, where: str, what: str) -> bytes:
    import zmq.utils.z85
    try:
        if key is not None and len(key) == 40 and len(zmq.utils.z85.decode(key)) == 32:
            return key
    except (ValueError, KeyError, TypeError):
        pass
    raise KeyFileError(f"{where}: holds no valid {what} (a ZeroMQ key file made by `cubecast keys` is expected)")


def _read(path, role: str, secret_needed: bool) -> tuple[bytes, bytes | None]:
    import zmq
    import zmq.auth
    if not zmq.has("curve"):
        raise KeyFileError(f"{role}: this ZeroMQ library was built without CURVE security")
    p = Path(path)
    where = f"{role} {p}"
    if not p.is_file():
        raise KeyFileError(f"{where}: no such key file")
    try:
        public, secret = zmq.auth.load_certificate(str(p))
    except OSError as exc:
        raise KeyFileError(f"{where}: cannot read key file: {exc.strerror or exc}") from None
    except ValueError:
        raise KeyFileError(f"{where}: holds no public key (a ZeroMQ key file made by `cubecast keys` is "
                           "expected)") from None
    public = _z85_key(public, where, "public key")
    if not secret_needed:
        return public, None
    if secret is None:
        raise KeyFileError(f"{where}: holds only a public key; give the .key_secret file here")
    return public, _z85_key(secret, where, "secret key")


def load_feed_keys(server_key, key, *, server_role: str = "--server-key", key_role: str = "--key") -> FeedKeys | None:
    """FeedKeys from the daemon's public key file and this side's secret key file; None when neither is
    given. Raises KeyFileError naming the flag and the file."""
    if server_key is None and key is None:
        return None
    if server_key is None or key is None:
        raise KeyFileError(f"{server_role} and {key_role}: give both (the daemon's public key and this side's "
                           "secret key) or neither")
    server_public, _ = _read(server_key, server_role, False)
    public, secret = _read(key, key_role, True)
    return FeedKeys(server_public, public, secret)
