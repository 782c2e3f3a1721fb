"""`shotpair simulate`: serve a simulated bench on wires and write the bench file that reaches it.

``shotpair simulate BENCH --write-config OUT.toml [--fast] [--all-scpi] [--latency-ms X]`` validates BENCH,
starts a :class:`~shotpair.simulators.wire.launcher.WireBench` (SCPI devices on 127.0.0.1 sockets, the
made-up serial controller on pseudo-terminals), writes OUT.toml, prints one line per instrument and then
``ready: OUT.toml`` on stdout (flushed, so a script can wait for it), and serves until SIGINT or SIGTERM.
User mistakes end with one line on stderr and exit 2, never a traceback. This module parses arguments,
prints and waits; it must not talk to instruments itself or change the user's files other than OUT.
"""

from __future__ import annotations

import argparse
import math
import os
import signal
import sys
import threading
from pathlib import Path
from typing import Any, Sequence

from shotpair.drivers.errors import ConfigError, ShotpairError, StorageError

from .config import check_output, load_config

__all__ = ["add_simulate_command", "cmd_simulate", "build_parser", "main"]

EXIT_OK, EXIT_FAILED, EXIT_USAGE = 0, 1, 2


def add_simulate_command(subparsers: Any) -> argparse.ArgumentParser:
    """Add the ``simulate`` sub-command to an ``argparse`` sub-parsers object; returns its parser."""
    p = subparsers.add_parser("simulate", help="serve the simulated bench on wires (SCPI sockets, serial ptys) "
                              "and write a bench file for the real drivers")
    p.add_argument("bench", metavar="BENCH", help="TOML file with [bench] (and [simulation])")
    p.add_argument("--write-config", metavar="OUT.toml", required=True,
                   help="bench file to write, whose instruments use the real drivers at the served addresses")
    p.add_argument("--fast", action="store_true", help="virtual time as fast as the computer allows (no latency)")
    p.add_argument("--all-scpi", action="store_true", help="serve the stage, chopper and shutter over SCPI too")
    p.add_argument("--latency-ms", type=float, metavar="X",
                   help="latency of every command, in ms (default: typical values; 0 with --fast)")
    p.set_defaults(func=cmd_simulate)
    return p


def _check_paths(args: argparse.Namespace) -> Path:
    out = Path(args.write_config)
    check_output(str(out), args.bench, "--write-config")
    try:
        same = out.exists() and os.path.samefile(out, args.bench)
    except OSError:
        same = False
    if same:
        raise ConfigError("would overwrite the bench file itself", key_path="--write-config", value=str(out),
                          allowed="another file name")
    return out


def cmd_simulate(args: argparse.Namespace) -> int:
    """Run the command (see the module docstring). Raises ShotpairError for what the user can fix."""
    from shotpair.simulators.wire.launcher import WireBench  # numpy and the models: only when used

    loaded = load_config(args.bench)
    if loaded.config.bench is None:
        raise ConfigError("no [bench] section: simulate needs a bench to serve", file=loaded.path, key_path="bench")
    out = _check_paths(args)
    latency_s = None
    if args.latency_ms is not None:
        if not (math.isfinite(args.latency_ms) and 0.0 <= args.latency_ms <= 10_000.0):
            raise ConfigError("not a latency", key_path="--latency-ms", value=args.latency_ms,
                              allowed="0 to 10000 ms")
        latency_s = args.latency_ms / 1000.0
    wire = WireBench(loaded, realtime=not args.fast, all_scpi=args.all_scpi, latency_s=latency_s)
    stop = threading.Event()

    def on_signal(signum: int, frame: object) -> None:
        stop.set()

    previous = {sig: signal.signal(sig, on_signal) for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        wire.start()
        wire.write_config(out)
        for line in wire.describe():
            print(line)
        print(f"ready: {out}", flush=True)
        while not stop.wait(0.5):  # a timed wait, so the signal handler always gets to run
            pass
    finally:
        wire.stop()
        for sig, old in previous.items():
            signal.signal(sig, old)
    print("simulators stopped", flush=True)
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    """A parser with only the ``simulate`` command (for :func:`main` and tests)."""
    parser = argparse.ArgumentParser(prog="shotpair")
    add_simulate_command(parser.add_subparsers(dest="command", required=True, metavar="COMMAND"))
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """``shotpair simulate ...`` on its own: returns the exit code."""
    args = build_parser().parse_args(argv)
    try:
        return int(args.func(args))
    except ShotpairError as exc:
        print(f"shotpair: error: {exc}", file=sys.stderr)
        return EXIT_USAGE if isinstance(exc, (ConfigError, StorageError)) else EXIT_FAILED
    except KeyboardInterrupt:
        return EXIT_OK


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
