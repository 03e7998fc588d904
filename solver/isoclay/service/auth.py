"""Who may talk to the solver: connection files (0600 in 0700), CURVE keys with a ZAP allow-list, replay guard.

The signing key travels only in the connection file (the approach of Jupyter's kernel
messaging, extended here to sign the array frames too). Listening beyond loopback is refused
unless CURVE encryption with an allow-list of client public keys is configured (CurveZMQ,
RFC 26; without a ZAP handler CURVE admits any client key, see FACTS.md).
"""

from __future__ import annotations

import ipaddress
import json
import os
import socket
import stat
import time
from collections import OrderedDict
from pathlib import Path

from .. import wire
from ..errors import InvalidInput


def default_run_dir() -> Path:
    runtime = os.environ.get("XDG_RUNTIME_DIR")
    base = Path(runtime) / "isoclay" if runtime and Path(runtime).is_dir() else Path.home() / ".isoclay" / "run"
    return base


def private_dir(path) -> Path:
    """Create (or tighten) a directory readable only by this user."""
    path = Path(path)
    path.mkdir(parents=True, exist_ok=True, mode=0o700)
    if os.name == "posix":
        os.chmod(path, 0o700)
    return path


def write_private_file(path, text: str) -> Path:
    """Write a file with mode 0600 atomically (temporary file, fsync, rename) in a 0700 directory."""
    path = Path(path)
    private_dir(path.parent)
    tmp = path.parent / f".{path.name}.{os.getpid()}.tmp"
    fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    try:
        os.write(fd, text.encode("utf-8"))
        os.fsync(fd)
    finally:
        os.close(fd)
    os.chmod(tmp, 0o600)
    os.replace(tmp, path)
    return path


def read_private_json(path) -> dict:
    path = Path(path)
    st = path.stat()
    if os.name == "posix" and st.st_mode & 0o077:
        raise InvalidInput(f"{path} is readable by other users (mode {stat.S_IMODE(st.st_mode):o}): chmod 600 it")
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except ValueError:
        raise InvalidInput(f"{path} is not valid JSON: delete it and restart the solver") from None
    if not isinstance(data, dict):
        raise InvalidInput(f"{path} must hold a JSON object")
    return data


def is_loopback(endpoint: str) -> bool:
    """True for tcp://127.x.x.x, tcp://[::1], tcp://localhost and ipc:// endpoints."""
    if endpoint.startswith("ipc://"):
        return True
    if not endpoint.startswith("tcp://"):
        return False
    host = endpoint[6:].rsplit(":", 1)[0].strip("[]")
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False  # an interface name or hostname: treat as public


def is_ipv6(endpoint: str) -> bool:
    """True for tcp://[address]:port endpoints (the socket needs ZeroMQ's IPV6 option)."""
    return endpoint.startswith("tcp://[")


def check_endpoint(endpoint: str, curve_ready: bool) -> str:
    if not endpoint.startswith(("tcp://", "ipc://")):
        raise InvalidInput(f"endpoint {endpoint!r} must look like tcp://127.0.0.1:PORT")
    if endpoint.startswith("tcp://") and ":" not in endpoint[6:]:
        raise InvalidInput(f"endpoint {endpoint!r} lacks a port: use tcp://HOST:PORT (or :* for a free one)")
    if not is_loopback(endpoint) and not curve_ready:
        raise InvalidInput(f"refusing to listen on {endpoint} without CURVE: anyone on the network could run jobs "
                           "and read meshes; pass --curve-secret and --allow-keys, or listen on 127.0.0.1")
    return endpoint


def free_loopback_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


# ---------------------------------------------------------------- CURVE keys

def create_keypair(directory, name: str) -> tuple[Path, Path]:
    """Write NAME.key (public) and NAME.key_secret (both 0600, in a 0700 directory); returns their paths."""
    import zmq

    if not name.replace("-", "").replace("_", "").isalnum():
        raise InvalidInput(f"key name {name!r} must be letters, digits, - or _")
    public, secret = zmq.curve_keypair()
    directory = private_dir(directory)
    pub = write_private_file(directory / f"{name}.key", json.dumps({"public": public.decode()}) + "\n")
    sec = write_private_file(directory / f"{name}.key_secret",
                             json.dumps({"public": public.decode(), "secret": secret.decode()}) + "\n")
    return pub, sec


def load_keypair(path) -> tuple[str, str | None]:
    """(public, secret or None) from a key file written by create_keypair."""
    data = read_private_json(path)
    public, secret = data.get("public"), data.get("secret")
    if not isinstance(public, str) or len(public) != 40 or (secret is not None and len(secret) != 40):
        raise InvalidInput(f"{path} is not an isoclay CURVE key file: create one with `isoclay serve --new-key NAME`")
    return public, secret


def allowed_public_keys(directory) -> list[str]:
    """Public keys of every *.key file in the allow-list directory."""
    keys = [load_keypair(p)[0] for p in sorted(Path(directory).glob("*.key"))]
    if not keys:
        raise InvalidInput(f"no client keys (*.key) in {directory}: create them with `isoclay serve --new-key NAME`")
    return keys


class Authenticator:
    """A ZAP handler (RFC 27) that admits a connection only after its handshake proves a credential.

    With CURVE: the client's public key must be on the allow-list. Without: the client must log in
    with PLAIN and the admission password derived from the connection file's key
    (wire.admission_password), so a process that never read the connection file cannot deliver a
    single message, let alone make the server hold a huge one. ``rejected`` counts refusals.
    """

    DOMAIN = "isoclay"

    def __init__(self, context, public_keys=None, password: str | None = None):
        self.allow_list = _AllowList(public_keys or [])
        self._auth = _counting_authenticator(context, self.allow_list)
        self._auth.start()
        if public_keys is not None:
            self._auth.configure_curve_callback(domain=self.DOMAIN, credentials_provider=self.allow_list)
        else:
            self._auth.configure_plain(domain=self.DOMAIN, passwords={wire.ADMISSION_USER: password})

    @property
    def rejected(self) -> int:
        return self.allow_list.rejected

    def stop(self) -> None:
        self._auth.stop()


def _counting_authenticator(context, allow_list):
    from zmq.auth.thread import ThreadAuthenticator

    class Counting(ThreadAuthenticator):
        def _authenticate_plain(self, domain, username, password):
            allowed, reason = super()._authenticate_plain(domain, username, password)
            allow_list.rejected += not allowed
            return allowed, reason

    return Counting(context)


class _AllowList:
    def __init__(self, public_keys):
        self.keys = {k.encode() for k in public_keys}  # z85 text, as pyzmq hands them to callback
        self.rejected = 0

    def callback(self, domain, key) -> bool:
        ok = bytes(key) in self.keys
        self.rejected += not ok
        return ok


# ---------------------------------------------------------------- replay guard

class ReplayGuard:
    """Per-session last sequence number, remembered for twice the clock window.

    A message is fresh if its seq is above the session's last; a repeat of exactly the last
    seq with the same signature is a client retry (answered from the reply cache).
    """

    def __init__(self, max_sessions: int = 100_000, keep_s: float = 2 * wire.CLOCK_WINDOW_S):
        self.sessions: OrderedDict[str, list] = OrderedDict()
        self.max_sessions = max_sessions
        self.keep_s = keep_s

    def classify(self, session: str, seq: int, signature: bytes) -> tuple[str, object]:
        """('new', None), ('retry', cached reply or None) or ('replay', None)."""
        entry = self.sessions.get(session)
        if entry is None:
            return "new", None
        last_seq, last_sig, reply, _ = entry
        if seq > last_seq:
            return "new", None
        if seq == last_seq and signature == last_sig:
            return "retry", reply
        return "replay", None

    def record(self, session: str, seq: int, signature: bytes, reply) -> None:
        now = time.monotonic()
        self.sessions[session] = [seq, signature, reply, now]
        self.sessions.move_to_end(session)
        while self.sessions:
            oldest = next(iter(self.sessions.values()))
            if len(self.sessions) > self.max_sessions or now - oldest[3] > self.keep_s:
                self.sessions.popitem(last=False)
            else:
                break
