"""`shotpair keys DIR [--client NAME ...] [--read-only NAME ...]`: write the CURVE key pairs of a daemon and its clients.

For: the person setting up remote control. Writes the layout daemon/auth.py reads (its docstring shows
it): the daemon's pair once, then one pair per named client in the folder of its rights. Secret files
are mode 0600 from the moment they carry their final name, public ones 0644, the folders 0700. Must not:
overwrite or delete any existing key (everything is checked before the first file is written), read
or print a secret key, or talk to a daemon.
"""

from __future__ import annotations

import argparse
import os
import shutil
import tempfile
from pathlib import Path
from typing import Any

import zmq.auth

from shotpair.drivers.errors import ConfigError

from .auth import CONTROL, DAEMON_KEY, DAEMON_SECRET, READ_ONLY, RIGHTS_FOLDERS, valid_client_name

__all__ = ["add_keys_command", "write_keys", "PUBLIC_MODE", "SECRET_MODE", "FOLDER_MODE"]

PUBLIC_MODE, SECRET_MODE, FOLDER_MODE = 0o644, 0o600, 0o700


def _mkdir_private(path: Path) -> None:
    if path.exists():
        if not path.is_dir():
            raise ConfigError("exists and is not a folder", file=str(path), allowed="a new or existing keys folder")
        return
    path.mkdir(mode=FOLDER_MODE, parents=True)
    os.chmod(path, FOLDER_MODE)  # mkdir's mode is reduced by the umask


def _install_pair(root: Path, target: Path, name: str) -> tuple[Path, Path]:
    """Create a pair in a private scratch folder, set the modes, then give it its final names without
    replacing anything (os.link fails if the name exists). Returns (public, secret) paths."""
    scratch = Path(tempfile.mkdtemp(prefix=".new-", dir=root))  # mode 0700 by mkdtemp's definition
    try:
        public_tmp, secret_tmp = (Path(p) for p in zmq.auth.create_certificates(scratch, name))
        os.chmod(secret_tmp, SECRET_MODE)
        os.chmod(public_tmp, PUBLIC_MODE)
        public, secret = target / f"{name}.key", target / f"{name}.key_secret"
        os.link(secret_tmp, secret)
        try:
            os.link(public_tmp, public)
        except OSError:
            secret.unlink()
            raise
        return public, secret
    except FileExistsError as exc:
        raise ConfigError("refusing to overwrite an existing key", file=str(exc.filename2 or exc.filename)) from None
    except OSError as exc:
        raise ConfigError(f"cannot write the key files ({exc.strerror})", file=str(target)) from None
    finally:
        shutil.rmtree(scratch, ignore_errors=True)


def write_keys(folder: str | os.PathLike[str], control: list[str], read_only: list[str]) -> list[tuple[Path, str]]:
    """Write the daemon's pair (if the folder has none yet) and one pair per client.

    Returns the files written with a description of each. Raises ConfigError, before writing anything,
    when a name is invalid or given twice, when a file to be written exists already, or when there is
    nothing to write; and when the folder cannot be written.
    """
    root = Path(folder).expanduser()
    wanted = [(n, CONTROL) for n in control] + [(n, READ_ONLY) for n in read_only]
    seen: set[str] = set()
    for name, _ in wanted:
        if not valid_client_name(name):
            raise ConfigError("not a client name", file="command line", value=name,
                              allowed="letters, digits, _ . - (at most 64, not starting with a dot; not 'daemon')")
        if name in seen:
            raise ConfigError("client named twice", file="command line", value=name)
        seen.add(name)
    daemon_public, daemon_secret = root / DAEMON_KEY, root / DAEMON_SECRET
    have_daemon = daemon_secret.exists()
    if daemon_public.exists() != have_daemon:
        half = daemon_public if daemon_public.exists() else daemon_secret
        raise ConfigError("the daemon's key pair is incomplete (only this half exists)", file=str(half),
                          allowed="both daemon.key and daemon.key_secret, or neither")
    for name, _ in wanted:
        for sub in RIGHTS_FOLDERS.values():  # one name, one client, whatever its rights
            for suffix in (".key", ".key_secret"):
                existing = root / sub / f"{name}{suffix}"
                if existing.exists():
                    raise ConfigError("refusing to overwrite an existing key", file=str(existing),
                                      allowed="a new client name (delete both files of a client to revoke it)")
    if have_daemon and not wanted:
        raise ConfigError("refusing to overwrite the daemon's existing key", file=str(daemon_secret),
                          allowed="--client NAME or --read-only NAME to add clients with the existing daemon key")
    _mkdir_private(root)
    written: list[tuple[Path, str]] = []
    if not have_daemon:
        pub, sec = _install_pair(root, root, "daemon")
        written += [(pub, "daemon public key: copy it to every client's computer"),
                    (sec, "daemon SECRET key (0600): stays on the daemon's computer")]
    for name, rights in wanted:
        target = root / RIGHTS_FOLDERS[rights]
        _mkdir_private(target.parent)
        _mkdir_private(target)
        pub, sec = _install_pair(root, target, name)
        written += [(pub, f"{name}'s public key ({rights}): the daemon reads it"),
                    (sec, f"{name}'s SECRET key (0600): belongs to {name} only")]
    return written


def _usage(root: Path, control: list[str], read_only: list[str]) -> str:
    who = (control + read_only)[:1] or ["NAME"]
    name = who[0]
    sub = RIGHTS_FOLDERS[CONTROL if name in control or not read_only else READ_ONLY]
    return "\n".join([
        "how to use them:",
        f"  daemon:  [stream.auth] keys_dir = \"{root}\" in the bench file, or  shotpair serve BENCH --keys {root}",
        "           (it reads the folder when it starts: restart it after adding or revoking a client)",
        f"  client on this computer:  shotpair status --keys {root} --client {name}",
        f"  client elsewhere: copy {root / DAEMON_KEY} and {root / sub / (name + '.key_secret')} into a folder K",
        "           there (chmod 700 K, chmod 600 the .key_secret), then",
        f"           shotpair monitor --control tcp://HOST:5562 --keys K --client {name}",
        "  revoke a client: delete its two files and restart the daemon",
    ])


def _cmd_keys(args: argparse.Namespace) -> int:
    control, read_only = list(args.client or []), list(args.read_only or [])
    written = write_keys(args.folder, control, read_only)
    root = Path(args.folder).expanduser()
    width = max(len(str(p)) for p, _ in written)
    print(f"wrote {len(written)} key file(s) in {root} (new folders mode 0700):")
    for path, text in written:
        print(f"  {str(path):<{width}}  {text}")
    print(_usage(root, control, read_only))
    return 0


def add_keys_command(sub: Any) -> argparse.ArgumentParser:
    """Add ``keys`` to an argparse sub-parser set; its ``func(args)`` returns the exit code."""
    p = sub.add_parser("keys", help="create CURVE keys for an authenticated daemon and its clients (never "
                                    "overwrites)")
    p.add_argument("folder", metavar="DIR", help="keys folder (created mode 0700 if missing)")
    p.add_argument("--client", action="append", metavar="NAME",
                   help="a client with control rights (start, abort, move, ...); repeat for several")
    p.add_argument("--read-only", action="append", metavar="NAME",
                   help="a client that may watch only: the stream, status and snapshot; repeat for several")
    p.set_defaults(func=_cmd_keys)
    return p
