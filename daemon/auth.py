"""CURVE authentication of the daemon's two sockets: the keys, who may do what, and why a client was refused.

For: the daemon (a ZAP handler on its own Context that admits only listed client keys and labels every
connection with the client's name and rights), the clients (keys set on their sockets, and a handshake
watcher that turns a silent refusal into a reason), and the CLI (where the keys are; whether an
endpoint may go without them). Must not: open sockets to the network, write key files (keys_cmd.py
does), read keys from anywhere but the paths it is given, or touch instruments.

A keys folder, as ``shotpair keys DIR`` writes it::

    DIR/daemon.key                         the daemon's public key (every client needs a copy)
    DIR/daemon.key_secret                  the daemon's secret key (mode 0600, stays with the daemon)
    DIR/clients/control/NAME.key           public key of a client with control rights
    DIR/clients/control/NAME.key_secret    that client's secret key (mode 0600; belongs on its computer)
    DIR/clients/read-only/NAME.key         public key of a client that may only watch
    DIR/clients/read-only/NAME.key_secret

Rights come from the folder a client's public key is in. The ZAP handler gives each connection the
ZMQ User-Id ``control:NAME`` or ``read-only:NAME``; libzmq attaches it to every message received on that
connection, so the control socket reads the rights from the request itself (``Frame.get("User-Id")``)
and no client-chosen value (routing id, a field in the request) can raise them. Unknown keys never get a
connection: the handshake fails and, as ZeroMQ does, nothing is sent back but the refusal.
"""

from __future__ import annotations

import argparse
import ipaddress
import logging
import os
import re
import stat
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping

import zmq
from zmq.auth.thread import ThreadAuthenticator
from zmq.utils import z85
from zmq.utils.monitor import recv_monitor_message

from shotpair.drivers.errors import ConfigError, ProtocolError

__all__ = [
    "CONTROL",
    "READ_ONLY",
    "RIGHTS_FOLDERS",
    "DAEMON_KEY",
    "DAEMON_SECRET",
    "READ_ONLY_COMMANDS",
    "ZAP_DOMAIN",
    "ClientKeys",
    "ServerKeys",
    "DaemonAuthenticator",
    "HandshakeWatch",
    "is_loopback",
    "auth_required",
    "load_server_keys",
    "load_client_keys",
    "server_keys_for",
    "rights_of",
    "check_command",
    "valid_client_name",
    "add_client_key_options",
    "client_keys_from_args",
]

log = logging.getLogger(__name__)

CONTROL = "control"
READ_ONLY = "read-only"
#: Rights → the folder (inside the keys folder) that holds the public keys of clients with those rights.
RIGHTS_FOLDERS = {CONTROL: Path("clients") / "control", READ_ONLY: Path("clients") / "read-only"}
DAEMON_KEY = "daemon.key"
DAEMON_SECRET = "daemon.key_secret"
#: Commands that change nothing: a read-only client may ask them (``shotpair monitor`` needs both).
READ_ONLY_COMMANDS = frozenset({"status", "snapshot"})
#: The ZAP domain the daemon's sockets announce (clients need not know it).
ZAP_DOMAIN = "shotpair"
_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")
_Z85_KEY_CHARS = 40  # a 32-byte CURVE key in Z85 text (ZeroMQ RFC 32)


def valid_client_name(name: str) -> bool:
    """A client name is a file name stem: letters, digits, ``_ . -``, at most 64, not starting with a dot,
    and not ``daemon`` (whose files sit beside a copied client's in a client's folder)."""
    return bool(_NAME.match(name)) and not name.endswith((".key", ".key_secret")) and name != "daemon"


# ---------------------------------------------------------------------------------------------- endpoints
def is_loopback(endpoint: str) -> bool:
    """True for endpoints only this computer can reach: ``ipc://``, ``inproc://``, and ``tcp://`` on
    127.0.0.0/8, ``[::1]`` or ``localhost``. Wildcards (``*``), interface names, host names and other
    addresses count as reachable from the network (the safe side)."""
    if endpoint.startswith(("ipc://", "inproc://")):
        return True
    if not endpoint.startswith("tcp://"):
        return False
    host = endpoint[len("tcp://"):].rsplit(";", 1)[-1].rpartition(":")[0]
    if host.startswith("[") and host.endswith("]"):
        host = host[1:-1]
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def auth_required(enabled: bool | None, keys_dir: str | None, endpoints: Mapping[str, str], *,
                  file: str | None = None, forced: bool = False) -> bool:
    """Whether the daemon authenticates its clients; refuses an endpoint that would be open without it.

    Parameters
    ----------
    enabled, keys_dir:
        ``[stream.auth]`` as written: ``enabled`` None means "on when keys are given or an endpoint is
        reachable from other computers".
    endpoints:
        Where each socket binds, keyed by the name a message should show (``stream.data_endpoint``,
        ``--data``).
    file:
        The configuration file, for messages.
    forced:
        Keys were given on the command line (``--keys``): authentication is on whatever the file says.

    Raises
    ------
    ConfigError
        An endpoint is reachable from the network and authentication is off or has no keys, or it is
        switched on without keys. Raised before anything binds or connects.
    """
    exposed = [(name, ep) for name, ep in endpoints.items() if not is_loopback(ep)]
    on = True if forced else (enabled if enabled is not None else (keys_dir is not None or bool(exposed)))
    if not on:
        if exposed:
            name, ep = exposed[0]
            raise ConfigError(f"authentication cannot be switched off while {name} = {ep} is reachable from "
                              "other computers", file=file, key_path="stream.auth.enabled", value=enabled,
                              allowed="true, or loopback endpoints (tcp://127.0.0.1:PORT; reach them from "
                                      "elsewhere through an SSH tunnel)")
        return False
    if keys_dir is None and not forced:
        if exposed:
            name, ep = exposed[0]
            message = (f"{name} = {ep} is reachable from other computers, and the daemon offers its stream "
                       "and control there only with authentication: no keys folder is given")
        else:
            message = "authentication is switched on but no keys folder is given"
        raise ConfigError(message, file=file, key_path="stream.auth.keys_dir",
                          allowed="a folder written by `shotpair keys DIR` ([stream.auth] keys_dir = \"DIR\" "
                                  "or --keys DIR), or tcp://127.0.0.1 endpoints")
    return True


# ---------------------------------------------------------------------------------------------- key files
def _read_key_file(path: Path, *, secret: bool) -> tuple[bytes, bytes | None]:
    """(public, secret) Z85 keys of a key file. Raises ConfigError naming the path for every problem."""
    shown = str(path)
    try:
        st = path.stat()
    except FileNotFoundError:
        raise ConfigError("key file not found", file=shown,
                          allowed="a file written by `shotpair keys`" + (" (*.key_secret)" if secret else "")) from None
    except OSError as exc:
        raise ConfigError(f"cannot read the key file ({exc.strerror})", file=shown) from None
    if not stat.S_ISREG(st.st_mode):
        raise ConfigError("is not a key file (a folder?)", file=shown)
    try:
        public, secret_key = zmq.auth.load_certificate(path)
    except OSError as exc:
        raise ConfigError(f"cannot read the key file ({exc.strerror or exc})", file=shown) from None
    except ValueError:
        raise ConfigError("not a key file: no public-key line", file=shown) from None
    for key in (public, secret_key):
        if key is not None and not _valid_z85(key):
            raise ConfigError("malformed key: expected 40 characters of Z85 text", file=shown)
    if secret and secret_key is None:
        raise ConfigError("holds no secret key (a public .key file?)", file=shown,
                          allowed="the matching .key_secret file")
    if secret and os.name == "posix" and st.st_mode & 0o077:  # as ssh does with its private keys
        raise ConfigError(f"secret key file is readable by other users (mode {stat.S_IMODE(st.st_mode):04o})",
                          file=shown, allowed=f"mode 0600: chmod 600 {shown}")
    return public, secret_key


def _valid_z85(key: bytes) -> bool:
    if len(key) != _Z85_KEY_CHARS:
        return False
    try:
        return len(z85.decode(key)) == 32
    except (ValueError, KeyError, TypeError):
        return False


@dataclass(frozen=True)
class ServerKeys:
    """The daemon's key pair and the clients it admits.

    ``clients`` maps a client's public key (Z85 bytes) to ``(name, rights)``, rights being CONTROL or
    READ_ONLY.
    """

    folder: Path
    public_key: bytes
    secret_key: bytes
    clients: dict[bytes, tuple[str, str]] = field(default_factory=dict)

    def names(self, rights: str) -> list[str]:
        return sorted(name for name, r in self.clients.values() if r == rights)

    def describe(self) -> str:
        control, read_only = self.names(CONTROL), self.names(READ_ONLY)
        return (f"CURVE authentication with keys from {self.folder}: control {', '.join(control) or 'nobody'}; "
                f"read-only {', '.join(read_only) or 'nobody'}")


def load_server_keys(folder: str | os.PathLike[str]) -> ServerKeys:
    """Read a keys folder (layout in the module docstring). Read once: restart the daemon after adding
    or removing a client.

    Raises
    ------
    ConfigError
        The folder or the daemon's secret key is missing or unreadable, a secret key file is readable by
        others, a key file is malformed, a key is listed twice, or no client is listed at all.
    """
    root = Path(folder).expanduser()
    if not root.is_dir():
        raise ConfigError("keys folder not found", file=str(root), allowed="a folder written by `shotpair keys DIR`")
    public, secret = _read_key_file(root / DAEMON_SECRET, secret=True)
    assert secret is not None
    clients: dict[bytes, tuple[str, str]] = {}
    for rights, sub in RIGHTS_FOLDERS.items():
        where = root / sub
        if not where.is_dir():
            continue
        try:
            files = sorted(where.glob("*.key"))
        except OSError as exc:
            raise ConfigError(f"cannot list the folder ({exc.strerror})", file=str(where)) from None
        for path in files:
            key, _ = _read_key_file(path, secret=False)
            if key == public:
                raise ConfigError("this is the daemon's own public key, not a client's", file=str(path))
            if key in clients:
                other, other_rights = clients[key]
                raise ConfigError(f"the same key is already listed for client {other!r} ({other_rights})",
                                  file=str(path), allowed="one key file per client, in one rights folder")
            clients[key] = (path.stem, rights)
    if not clients:
        raise ConfigError("no client keys: nobody could connect", file=str(root),
                          allowed=f"add clients with `shotpair keys {root} --client NAME` (control) or "
                                  "--read-only NAME")
    return ServerKeys(root, public, secret, clients)


def server_keys_for(enabled: bool | None, keys_dir: str | None, endpoints: Mapping[str, str], *,
                    config_path: str | None = None, cli_keys_dir: str | None = None) -> ServerKeys | None:
    """The keys the daemon must use for these endpoints, or None when it runs without authentication.

    ``keys_dir`` (from the file) is relative to the configuration file's folder; ``cli_keys_dir``
    (``--keys``) to the working folder and wins. Raises ConfigError (see :func:`auth_required` and
    :func:`load_server_keys`); nothing is bound or connected by this function.
    """
    if not auth_required(enabled, keys_dir, endpoints, file=config_path, forced=cli_keys_dir is not None):
        return None
    if cli_keys_dir is not None:
        return load_server_keys(cli_keys_dir)
    assert keys_dir is not None
    folder = Path(keys_dir).expanduser()
    if not folder.is_absolute() and config_path and not config_path.startswith("<"):
        folder = Path(config_path).parent / folder
    if not folder.is_dir():
        raise ConfigError("keys folder not found", file=config_path, key_path="stream.auth.keys_dir",
                          value=keys_dir, allowed=f"a folder written by `shotpair keys DIR` (looked in {folder})")
    return load_server_keys(folder)


@dataclass(frozen=True)
class ClientKeys:
    """A client's key pair and the daemon's public key (Z85 bytes); ``source`` names the files."""

    public_key: bytes
    secret_key: bytes
    daemon_key: bytes
    secret_file: str
    daemon_key_file: str

    def apply(self, sock: zmq.Socket[Any]) -> None:
        """Make ``sock`` a CURVE client of the daemon (before it connects)."""
        sock.setsockopt(zmq.CURVE_PUBLICKEY, self.public_key)
        sock.setsockopt(zmq.CURVE_SECRETKEY, self.secret_key)
        sock.setsockopt(zmq.CURVE_SERVERKEY, self.daemon_key)


def load_client_keys(*, keys_dir: str | None = None, client: str | None = None, client_key: str | None = None,
                     daemon_key: str | None = None) -> ClientKeys | None:
    """Find and read a client's keys; None when no option was given (no authentication).

    Either ``keys_dir`` and ``client``: the secret key is looked for in ``clients/control/``,
    ``clients/read-only/`` and then the folder itself (a copy on a client's computer holding just
    ``daemon.key`` and ``NAME.key_secret``), the daemon key is ``keys_dir/daemon.key``; or ``client_key``
    (a ``.key_secret`` file) with ``daemon_key`` (the daemon's ``.key``), either of which overrides.

    Raises
    ------
    ConfigError
        A needed option is missing, a file is missing, unreadable, malformed, or a secret key file is
        readable by other users.
    """
    if keys_dir is None and client is None and client_key is None and daemon_key is None:
        return None
    root = Path(keys_dir).expanduser() if keys_dir is not None else None
    if client_key is None:
        if root is None or client is None:
            raise ConfigError("a client needs --keys DIR with --client NAME, or --client-key FILE with --daemon-key "
                              "FILE", file="command line", key_path="--keys" if root is None else "--client")
        if not valid_client_name(client):
            raise ConfigError("not a client name", file="command line", key_path="--client", value=client,
                              allowed="letters, digits, _ . - (as given to `shotpair keys --client`)")
        if not root.is_dir():
            raise ConfigError("keys folder not found", file=str(root), allowed="a folder written by `shotpair keys`")
        candidates = [root / sub / f"{client}.key_secret" for sub in RIGHTS_FOLDERS.values()]
        candidates.append(root / f"{client}.key_secret")
        found = next((p for p in candidates if p.exists()), None)
        if found is None:
            raise ConfigError(f"no secret key for client {client!r}", file=str(root),
                              allowed="one of " + ", ".join(str(p) for p in candidates))
        secret_path = found
    else:
        secret_path = Path(client_key).expanduser()
    if daemon_key is not None:
        daemon_path = Path(daemon_key).expanduser()
    elif root is not None:
        daemon_path = root / DAEMON_KEY
    else:
        raise ConfigError("--client-key needs the daemon's public key too", file="command line",
                          key_path="--daemon-key", allowed="--daemon-key FILE (daemon.key) or --keys DIR")
    public, secret = _read_key_file(secret_path, secret=True)
    server, _ = _read_key_file(daemon_path, secret=False)
    assert secret is not None
    return ClientKeys(public, secret, server, str(secret_path), str(daemon_path))


# ---------------------------------------------------------------------------------------------- daemon side
class _Zap(ThreadAuthenticator):
    """pyzmq's ZAP handler thread; the User-Id of an admitted client carries its rights and name."""

    def __init__(self, context: zmq.Context[Any], keys: ServerKeys) -> None:
        super().__init__(context, log=logging.getLogger(__name__ + ".zap"))
        self._keys = keys
        self._refused: set[bytes] = set()

    def callback(self, domain: str, key: bytes) -> bool:  # the credentials provider protocol (pyzmq)
        if key in self._keys.clients:
            return True
        if key not in self._refused and len(self._refused) < 1000:  # say it once per key, not per retry
            self._refused.add(key)
            log.warning("refused a connection: client key %s is not in %s", key.decode("ascii", "replace"),
                        self._keys.folder)
        return False

    def curve_user_id(self, client_public_key: bytes) -> str:
        name, rights = self._keys.clients[z85.encode(client_public_key)]
        return f"{rights}:{name}"


class DaemonAuthenticator:
    """Runs the ZAP handler on the daemon's Context and makes its sockets CURVE servers.

    Order matters and is the caller's: :meth:`start` before any socket binds, :meth:`secure` on each
    socket before it binds, :meth:`stop` after the sockets are closed and before the Context terms.
    The sockets also enforce the ZAP domain, so a connection is refused (not let through) should the
    handler ever be missing.
    """

    def __init__(self, context: zmq.Context[Any], keys: ServerKeys) -> None:
        self.keys = keys
        self._zap = _Zap(context, keys)
        self._started = False

    def start(self) -> None:
        self._zap.start()
        self._zap.configure_curve_callback(ZAP_DOMAIN, credentials_provider=self._zap)
        self._started = True

    def secure(self, sock: zmq.Socket[Any]) -> None:
        sock.setsockopt(zmq.CURVE_SERVER, 1)
        sock.setsockopt(zmq.CURVE_SECRETKEY, self.keys.secret_key)
        sock.setsockopt(zmq.ZAP_DOMAIN, ZAP_DOMAIN.encode("ascii"))
        sock.setsockopt(zmq.ZAP_ENFORCE_DOMAIN, 1)

    def stop(self) -> None:
        if self._started:
            self._zap.stop()
            self._started = False


def rights_of(frame: zmq.Frame) -> tuple[str | None, str | None]:
    """(rights, client name) from the User-Id of a message received with ``copy=False``; (None, None) when
    the message carries none (it did not come through the ZAP handler)."""
    try:
        user = frame.get("User-Id")
    except zmq.ZMQError:
        return None, None
    rights, _, name = str(user).partition(":")
    return (rights, name) if rights in RIGHTS_FOLDERS else (None, None)


def check_command(rights: str | None, name: str | None, cmd: str) -> None:
    """Raise ProtocolError ``forbidden`` unless a client with ``rights`` may run ``cmd``."""
    if rights == CONTROL or (rights == READ_ONLY and cmd in READ_ONLY_COMMANDS):
        return
    who = f"client {name!r} is read-only" if rights == READ_ONLY else "this connection has no known rights"
    raise ProtocolError(f"{cmd}: forbidden: {who} (allowed: {', '.join(sorted(READ_ONLY_COMMANDS))})",
                        code="forbidden")


# ---------------------------------------------------------------------------------------------- client side
_WATCHED = (zmq.EVENT_HANDSHAKE_SUCCEEDED | zmq.EVENT_HANDSHAKE_FAILED_AUTH | zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL
            | zmq.EVENT_HANDSHAKE_FAILED_NO_DETAIL)


class HandshakeWatch:
    """Remembers how the ZMTP handshakes of a client socket failed, to explain a silent daemon.

    A ZeroMQ server that refuses a client sends nothing a client could read; only the socket's monitor
    events say what happened (libzmq 4.3 handshake events). The same refusal is reported in one of two
    ways depending on who closes first (measured: a NULL client of a CURVE daemon sees "mechanism
    mismatch" or "failed, no detail" at random, and retries after the latter), so every failure since the
    last successful handshake counts, the most telling first. Attach before connecting; :meth:`explain`
    drains the events without blocking.
    """

    def __init__(self, sock: zmq.Socket[Any]) -> None:
        self._sock = sock
        self._mon = sock.get_monitor_socket(events=_WATCHED)
        self._failures: set[tuple[int, int]] = set()
        self._succeeded = False  # the last handshake went through: the keys are not the problem

    def _drain(self) -> None:
        while self._mon.poll(0):
            try:
                ev = recv_monitor_message(self._mon, flags=zmq.NOBLOCK)
            except zmq.Again:
                return
            event, value = int(ev["event"]), int(ev["value"])
            self._succeeded = event == zmq.EVENT_HANDSHAKE_SUCCEEDED
            if self._succeeded:
                self._failures.clear()
            else:
                self._failures.add((event, value))

    def explain(self, keys: ClientKeys | None) -> str | None:
        """Why the daemon may have stayed silent, or None when nothing points at authentication."""
        self._drain()
        events = {event for event, _ in self._failures}
        mismatch = (zmq.EVENT_HANDSHAKE_FAILED_PROTOCOL, zmq.PROTOCOL_ERROR_ZMTP_MECHANISM_MISMATCH)
        if zmq.EVENT_HANDSHAKE_FAILED_AUTH in events:
            status = min(v for e, v in self._failures if e == zmq.EVENT_HANDSHAKE_FAILED_AUTH)
            return (f"the daemon refused this client's key (authentication status {status}): it is not among "
                    "the daemon's clients (clients/control or clients/read-only of its keys folder), or was "
                    "added after the daemon started")
        if mismatch in self._failures:
            if keys is None:
                return "the daemon requires authentication: pass --keys DIR --client NAME (keys from `shotpair keys`)"
            return "the daemon does not use authentication: leave out --keys/--client-key"
        if events:
            if keys is None:
                return ("the daemon broke off the handshake: it probably requires authentication (--keys DIR "
                        "--client NAME)")
            return (f"the daemon broke off the CURVE handshake: {keys.daemon_key_file} may not be this daemon's "
                    "public key, or the daemon does not know this client's key")
        if keys is None or self._succeeded:
            return None
        return ("authentication may be the reason: a daemon that does not accept this client's keys "
                f"({keys.secret_file}) drops the connection without a word")

    def close(self) -> None:
        try:
            self._sock.disable_monitor()
        except zmq.ZMQError:
            pass
        self._mon.close(linger=0)


# ---------------------------------------------------------------------------------------------- CLI
def add_client_key_options(p: argparse.ArgumentParser) -> None:
    """The options every client verb takes to authenticate (all optional: none means no keys)."""
    g = p.add_argument_group("authentication (a daemon with [stream.auth])")
    g.add_argument("--keys", metavar="DIR", help="keys folder from `shotpair keys` (or a copy holding daemon.key "
                                                 "and NAME.key_secret)")
    g.add_argument("--client", metavar="NAME", help="this client's name in the keys folder")
    g.add_argument("--client-key", metavar="FILE", help="this client's secret key file (instead of --client)")
    g.add_argument("--daemon-key", metavar="FILE", help="the daemon's public key file (default DIR/daemon.key)")


def client_keys_from_args(args: argparse.Namespace) -> ClientKeys | None:
    """The client's keys from :func:`add_client_key_options` options. Raises ConfigError."""
    return load_client_keys(keys_dir=getattr(args, "keys", None), client=getattr(args, "client", None),
                            client_key=getattr(args, "client_key", None), daemon_key=getattr(args, "daemon_key", None))
