"""Keys for every ZeroMQ endpoint: ZeroMQ's CURVE security, in ZeroMQ's own key-file format.

With keys, every connection to an endpoint is authenticated and encrypted (CurveZMQ: Curve25519 key
exchange, then authenticated encryption of every message). The side that binds (serve's tasks,
results and publish endpoints; the publishers of replay, simulate and adapter) holds its secret key
and a folder of the public keys of the clients it accepts (ServerKeys); the side that connects
(workers, serve's subscriber, record, view, trackers) holds its own secret key and the bound side's
public key (ClientKeys). A connection with any other key is refused during the handshake, before a
single message of it is read. A key added to the folder is accepted without a restart: the folder is
read again (at most every RESCAN_S) when an unknown key knocks.

`cubecast keys NAME --dir DIR` writes DIR/NAME.key (public: give it to the other side) and
DIR/NAME.key_secret (secret: readable by the owner only, never copied off the host that uses it).
Local workers started by serve get a key pair made for this run, handed over in their environment.

One ZeroMQ context has one authenticator (the ZAP handler); every ServerKeys gets a ZAP domain of its
own on it, so serve's worker and subscriber folders stay apart in one context.

Errors name the file by its role when one is given (the CLI passes its flag: "--key keys/a.key_secret:
no such key file").
"""

from __future__ import annotations

import itertools
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
        raise CubecastError("keys: this ZeroMQ library was built without CURVE security")


def _where(path: Path, role: str) -> str:
    return f"{role} {path}" if role else str(path)


def _check_z85(key: bytes | None, path: Path, what: str, role: str = "") -> bytes:
    try:
        if key is not None and len(key) == 40 and len(zmq.utils.z85.decode(key)) == 32:
            return key
    except (ValueError, KeyError, TypeError):
        pass
    raise CubecastError(f"{_where(path, role)}: holds no valid {what} (a ZeroMQ key file made by `cubecast keys` "
                        "is expected)")


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


def _read_key_file(path: str | Path, role: str = "") -> tuple[Path, bytes, bytes | None]:
    """(path, public key, secret key or None) of a ZeroMQ key file; errors name the file (and its role)."""
    _require_curve()
    p = Path(path)
    if not p.is_file():
        raise CubecastError(f"{_where(p, role)}: no such key file")
    try:
        public, secret = zmq.auth.load_certificate(str(p))
    except OSError as exc:
        raise CubecastError(f"{_where(p, role)}: cannot read key file: {exc.strerror or exc}") from None
    except ValueError:
        raise CubecastError(f"{_where(p, role)}: holds no public key (a ZeroMQ key file made by `cubecast keys` is "
                            "expected)") from None
    return p, _check_z85(public, p, "public key", role), secret


def load_secret_key(path: str | Path, role: str = "") -> tuple[bytes, bytes]:
    """(public, secret) Z85 keys from a NAME.key_secret file."""
    p, public, secret = _read_key_file(path, role)
    if secret is None:
        raise CubecastError(f"{_where(p, role)}: holds only a public key; give the {SECRET_SUFFIX} file here")
    return public, _check_z85(secret, p, "secret key", role)


def load_public_key(path: str | Path, role: str = "") -> bytes:
    """The Z85 public key of a NAME.key (or NAME.key_secret) file."""
    return _read_key_file(path, role)[1]


def public_keys_in(directory: str | Path, role: str = "worker keys folder") -> set[bytes]:
    """The public keys of every NAME.key file in a folder (a file that is not a key is an error)."""
    d = Path(directory)
    if not d.is_dir():
        raise CubecastError(f"{role} {d}: not a folder")
    return {load_public_key(p, f"{role}:") for p in sorted(d.glob(f"*{PUBLIC_SUFFIX}"))}


@dataclass(frozen=True)
class ClientKeys:
    """What a connecting side needs: the bound side's public key and its own key pair (Z85)."""

    server_public: bytes
    public: bytes
    secret: bytes

    @classmethod
    def from_files(cls, server_key: str | Path, key: str | Path, *, server_role: str = "",
                   key_role: str = "") -> ClientKeys:
        public, secret = load_secret_key(key, key_role)
        return cls(load_public_key(server_key, server_role), public, secret)

    @classmethod
    def from_env(cls, value: str) -> ClientKeys:
        parts = value.encode().split()
        if len(parts) != 3:
            raise CubecastError(f"{LOCAL_KEYS_ENV}: expected three keys")
        return cls(*parts)

    def to_env(self) -> str:
        return b" ".join((self.server_public, self.public, self.secret)).decode()

    def apply(self, sock: zmq.Socket) -> None:
        """Before connect(): the options apply to the connections made from then on."""
        sock.setsockopt(zmq.CURVE_SERVERKEY, self.server_public)
        sock.setsockopt(zmq.CURVE_PUBLICKEY, self.public)
        sock.setsockopt(zmq.CURVE_SECRETKEY, self.secret)


def client_keys_per_endpoint(endpoints: list[str], server_keys: list[str | Path] | None, key: str | Path | None,
                             *, server_role: str, key_role: str, endpoint_role: str) -> list[ClientKeys] | None:
    """ClientKeys for each of `endpoints` (None without keys): one public key of the bound side for all
    of them, or one per endpoint in the same order, and this side's own secret key."""
    server_keys = list(server_keys or [])
    if not server_keys and key is None:
        return None
    if not server_keys or key is None:
        raise CubecastError(f"{server_role} and {key_role}: give both (the public key of the side that binds and "
                            "this side's secret key) or neither")
    if len(server_keys) not in (1, len(endpoints)):
        raise CubecastError(f"{server_role}: {len(server_keys)} given for {len(endpoints)} {endpoint_role}s; give one "
                            f"for all of them, or one per {endpoint_role} in the same order")
    public, secret = load_secret_key(key, key_role)
    servers = [load_public_key(p, server_role) for p in server_keys]
    if len(servers) == 1:
        servers *= len(endpoints)
    return [ClientKeys(server, public, secret) for server in servers]


class _KeyGate:
    """The authenticator's judge: a client key is accepted when it is the local workers' key of this
    run or one of the folder's public keys (read again, at most every RESCAN_S, when a key is not
    known yet). Runs in the authenticator's thread."""

    def __init__(self, directory: Path, role: str, local_public: bytes | None, on_refused: Callable[[bytes], None]):
        self.directory = directory
        self.role = role
        self.known = public_keys_in(directory, role)
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
                    self.known = public_keys_in(self.directory, self.role)
                except CubecastError:
                    pass  # a half-written file: keep the keys we had
                if key in self.known:
                    return True
        self.on_refused(key)
        return False


# one authenticator (ZAP handler) per context, shared by the ServerKeys started on it: id(ctx) ->
# [authenticator, domains registered]
_AUTH_LOCK = threading.Lock()
_AUTHENTICATORS: dict[int, list] = {}
_DOMAINS = itertools.count(1)


def _attach(ctx: zmq.Context, domain: str, gate: _KeyGate) -> None:
    with _AUTH_LOCK:
        entry = _AUTHENTICATORS.get(id(ctx))
        if entry is None:
            auth = ThreadAuthenticator(ctx)
            auth.start()
            entry = _AUTHENTICATORS[id(ctx)] = [auth, set()]
        entry[0].configure_curve_callback(domain, gate)
        entry[1].add(domain)


def _detach(ctx: zmq.Context, domain: str) -> None:
    with _AUTH_LOCK:
        entry = _AUTHENTICATORS.get(id(ctx))
        if entry is None or domain not in entry[1]:
            return
        entry[1].discard(domain)
        entry[0].credentials_providers.pop(domain, None)
        if not entry[1]:
            del _AUTHENTICATORS[id(ctx)]
            entry[0].stop()


class ServerKeys:
    """A binding side's keys: its key pair and the folder of the public keys of the clients it accepts
    (`clients`: "worker" for serve's worker endpoints, which also get a key pair for its local
    workers; "subscriber" for a publisher). `start(ctx)` registers the folder with the context's
    authenticator; `apply(sock)` before binding; `stop()` before the context is terminated.
    key_role / dir_role name the secret key file and the folder in errors (the CLI's flags)."""

    def __init__(self, secret_key: str | Path, clients_dir: str | Path, *, clients: str = "worker",
                 key_role: str = "", dir_role: str | None = None):
        self.clients = clients
        self.public, self.secret = load_secret_key(secret_key, key_role)
        self.clients_dir = Path(clients_dir)
        self.dir_role = dir_role or f"{clients} keys folder"
        public_keys_in(self.clients_dir, self.dir_role)  # fail now, with the folder's name, not at the first client
        self.local = ClientKeys(self.public, *zmq.curve_keypair()) if clients == "worker" else None
        self.domain = f"cubecast-{clients}-{next(_DOMAINS)}"
        self.refused = 0
        self._ctx: zmq.Context | None = None
        self._on_refused: Callable[[bytes], None] = lambda key: None

    def on_refused(self, fn: Callable[[bytes], None]) -> None:
        self._on_refused = fn

    def _refused(self, key: bytes) -> None:
        self.refused += 1
        self._on_refused(key)

    def start(self, ctx: zmq.Context) -> None:
        if self._ctx is ctx:
            return
        if self._ctx is not None:
            raise CubecastError(f"{self.dir_role} {self.clients_dir}: these keys are in use in another ZeroMQ "
                                "context; make one ServerKeys per context")
        local = self.local.public if self.local is not None else None
        _attach(ctx, self.domain, _KeyGate(self.clients_dir, self.dir_role, local, self._refused))
        self._ctx = ctx

    def apply(self, sock: zmq.Socket) -> None:
        sock.setsockopt(zmq.CURVE_SERVER, 1)
        sock.setsockopt(zmq.CURVE_PUBLICKEY, self.public)
        sock.setsockopt(zmq.CURVE_SECRETKEY, self.secret)
        sock.setsockopt(zmq.ZAP_DOMAIN, self.domain.encode())

    def stop(self) -> None:
        if self._ctx is not None:
            _detach(self._ctx, self.domain)
            self._ctx = None
