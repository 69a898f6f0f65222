"""Keys for the worker endpoints: ZeroMQ's CURVE security, in ZeroMQ's own key-file format.

With keys, every connection to serve's tasks and results endpoints is authenticated and
encrypted (CurveZMQ: Curve25519 key exchange, then authenticated encryption of every message).
serve holds its secret key and a folder of the public keys of the workers it accepts; a worker holds
its own secret key and serve's public key. A connection with any other key is refused during the
handshake, before a single message of it is read.

`cubecast keys NAME --dir DIR` writes DIR/NAME.key (public: give it to the other side) and
DIR/NAME.key_secret (secret: readable by the owner only, never copied off the host that uses it).
Local workers started by serve get a key pair made for this run, handed over in their environment.
"""

from __future__ import annotations

import os
import re
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Callable

import zmq
import zmq.auth
import zmq.utils.z85
from zmq.auth.thread import ThreadAuthenticator

from .errors import CubecastError

PUBLIC_SUFFIX = ".key"
SECRET_SUFFIX = ".key_secret"
# local workers: "SERVER_PUBLIC WORKER_PUBLIC WORKER_SECRET" (Z85 text, which has no spaces)
LOCAL_KEYS_ENV = "CUBECAST_WORKER_KEYS"
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")
# a client key not in the folder: read the folder again at most this often (new workers join)
RESCAN_S = 1.0
# security handshakes that failed: refused key (AUTH), keys on one side only (PROTOCOL), undecipherable
HANDSHAKE_FAILED_EVENTS = (zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL
                           | zmq.EVENT_HANDSHAKE_FAILED_AUTH)


def curve_available() -> bool:
    return bool(zmq.has("curve"))


def _require_curve() -> None:
    if not curve_available():
        raise CubecastError("worker keys: this ZeroMQ library was built without CURVE security")


def _check_z85(key: bytes | None, path: Path, what: str) -> bytes:
    try:
        if key is not None and len(key) == 40 and len(zmq.utils.z85.decode(key)) == 32:
            return key
    except (ValueError, KeyError, TypeError):
        pass
    raise CubecastError(f"{path}: holds no valid {what} (a ZeroMQ key file made by `cubecast keys` is expected)")


def create_keys(name: str, directory: str | Path) -> tuple[Path, Path]:
    """Write DIR/NAME.key and DIR/NAME.key_secret (owner-only); never overwrite. Returns both paths."""
    _require_curve()
    if not _NAME.match(name or ""):
        raise CubecastError(f"keys NAME {name!r}: 1 to 64 letters, digits, '.', '_' or '-', starting with a "
                            "letter or digit")
    d = Path(directory)
    try:
        d.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise CubecastError(f"key folder {d}: cannot create it: {exc.strerror or exc}") from None
    public, secret = d / f"{name}{PUBLIC_SUFFIX}", d / f"{name}{SECRET_SUFFIX}"
    for p in (public, secret):
        if p.exists():
            raise CubecastError(f"{p}: exists already; keys are never overwritten (remove it first, or pick "
                                "another NAME)")
    old = os.umask(0o077)  # the secret file is created owner-only, never readable by others even briefly
    try:
        zmq.auth.create_certificates(str(d), name)
    except OSError as exc:
        raise CubecastError(f"key folder {d}: cannot write: {exc.strerror or exc}") from None
    finally:
        os.umask(old)
    os.chmod(secret, 0o600)
    os.chmod(public, 0o644)
    return public, secret


def _existing(path: str | Path) -> Path:
    p = Path(path)
    if not p.is_file():
        raise CubecastError(f"{p}: no such key file")
    return p


def _read_key_file(path: str | Path) -> tuple[Path, bytes, bytes | None]:
    """(path, public key, secret key or None) of a ZeroMQ key file; errors name the file."""
    _require_curve()
    p = _existing(path)
    try:
        public, secret = zmq.auth.load_certificate(str(p))
    except OSError as exc:
        raise CubecastError(f"{p}: cannot read key file: {exc.strerror or exc}") from None
    except ValueError:
        raise CubecastError(f"{p}: holds no public key (a ZeroMQ key file made by `cubecast keys` is "
                            "expected)") from None
    return p, _check_z85(public, p, "public key"), secret


def load_secret_key(path: str | Path) -> tuple[bytes, bytes]:
    """(public, secret) Z85 keys from a NAME.key_secret file."""
    p, public, secret = _read_key_file(path)
    if secret is None:
        raise CubecastError(f"{p}: holds only a public key; give the {SECRET_SUFFIX} file here")
    return public, _check_z85(secret, p, "secret key")


def load_public_key(path: str | Path) -> bytes:
    """The Z85 public key of a NAME.key (or NAME.key_secret) file."""
    return _read_key_file(path)[1]


def public_keys_in(directory: str | Path) -> set[bytes]:
    """The public keys of every NAME.key file in a folder (a file that is not a key is an error)."""
    d = Path(directory)
    if not d.is_dir():
        raise CubecastError(f"worker keys folder {d}: not a folder")
    return {load_public_key(p) for p in sorted(d.glob(f"*{PUBLIC_SUFFIX}"))}


@dataclass(frozen=True)
class ClientKeys:
    """What a worker needs: serve's public key and its own key pair (Z85)."""

    server_public: bytes
    public: bytes
    secret: bytes

    @classmethod
    def from_files(cls, server_key: str | Path, key: str | Path) -> ClientKeys:
        public, secret = load_secret_key(key)
        return cls(load_public_key(server_key), public, secret)

    @classmethod
    def from_env(cls, value: str) -> ClientKeys:
        parts = value.encode().split()
        if len(parts) != 3:
            raise CubecastError(f"{LOCAL_KEYS_ENV}: expected three keys")
        return cls(*parts)

    def to_env(self) -> str:
        return b" ".join((self.server_public, self.public, self.secret)).decode()

    def apply(self, sock: zmq.Socket) -> None:
        sock.setsockopt(zmq.CURVE_SERVERKEY, self.server_public)
        sock.setsockopt(zmq.CURVE_PUBLICKEY, self.public)
        sock.setsockopt(zmq.CURVE_SECRETKEY, self.secret)


class _KeyGate:
    """The authenticator's judge: a client key is accepted when it is the local workers' key of this
    run or one of the folder's public keys (read again, at most every RESCAN_S, when a key is not
    known yet). Runs in the authenticator's thread."""

    def __init__(self, directory: Path, local_public: bytes, on_refused: Callable[[bytes], None]):
        self.directory = directory
        self.known = public_keys_in(directory)
        self.local_public = local_public
        self.on_refused = on_refused
        self._scanned = time.monotonic()
        self._lock = threading.Lock()

    def callback(self, domain: str, key: bytes) -> bool:
        with self._lock:
            if key == self.local_public or key in self.known:
                return True
            if time.monotonic() - self._scanned >= RESCAN_S:
                self._scanned = time.monotonic()
                try:
                    self.known = public_keys_in(self.directory)
                except CubecastError:
                    pass  # a half-written file: keep the keys we had
                if key in self.known:
                    return True
        self.on_refused(key)
        return False


class ServerKeys:
    """serve's side: its key pair, the folder of accepted worker keys and a key pair for its local
    workers. `start(ctx)` runs the authenticator for the context; `apply(sock)` before binding."""

    def __init__(self, secret_key: str | Path, workers_dir: str | Path):
        self.public, self.secret = load_secret_key(secret_key)
        self.workers_dir = Path(workers_dir)
        public_keys_in(self.workers_dir)  # fail now, with the folder's name, not at the first worker
        local_public, local_secret = zmq.curve_keypair()
        self.local = ClientKeys(self.public, local_public, local_secret)
        self.refused = 0
        self._auth: ThreadAuthenticator | None = None
        self._on_refused: Callable[[bytes], None] = lambda key: None

    def on_refused(self, fn: Callable[[bytes], None]) -> None:
        self._on_refused = fn

    def _refused(self, key: bytes) -> None:
        self.refused += 1
        self._on_refused(key)

    def start(self, ctx: zmq.Context) -> None:
        self._auth = ThreadAuthenticator(ctx)
        self._auth.start()
        self._auth.configure_curve_callback("*", _KeyGate(self.workers_dir, self.local.public, self._refused))

    def apply(self, sock: zmq.Socket) -> None:
        sock.setsockopt(zmq.CURVE_SERVER, 1)
        sock.setsockopt(zmq.CURVE_PUBLICKEY, self.public)
        sock.setsockopt(zmq.CURVE_SECRETKEY, self.secret)

    def stop(self) -> None:
        if self._auth is not None:
            self._auth.stop()
            self._auth = None
