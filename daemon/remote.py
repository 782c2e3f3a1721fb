"""CLI verbs that talk to a running daemon: status, start, pause, resume, abort, move, shutdown.

Each prints a human summary (or the raw reply with --json) and turns a refused or unanswered request into
one clear line and a non-zero exit. No instrument is touched here.
"""

from __future__ import annotations

import argparse
import json
import tomllib
from typing import Any

from shotpair.drivers.errors import ConfigError

from .auth import add_client_key_options, client_keys_from_args
from .client import DEFAULT_CONTROL, ControlClient
from .progress import format_duration

__all__ = ["add_remote_commands", "describe_status"]


def describe_status(st: dict[str, Any]) -> str:
    """One or two lines a person reads: the state, and where the scan is."""
    line = f"state {st.get('state')}"
    if st.get("scan_id"):
        line += f", scan {st['scan_id']}"
    if st.get("state") in ("preparing", "acquiring", "paused", "stopping") and st.get("points_total"):
        parts = [f"sweep {st.get('sweep') or 1}/{st.get('sweeps')}", f"point {st.get('point') or 0}/{st.get('points')}",
                 f"{st.get('points_done', 0)}/{st.get('points_total')} done"]
        if st.get("delay_ps") is not None:
            parts.append(f"delay {st['delay_ps']:.4g} ps")
        if st.get("shots_per_s"):
            parts.append(f"{st['shots_per_s']:.0f} shots/s")
        if st.get("rejected_fraction") is not None:
            parts.append(f"rejected {100 * st['rejected_fraction']:.2f} %")
        if st.get("excess_noise_median") is not None:
            parts.append(f"noise/floor {st['excess_noise_median']:.2f}")
        if st.get("eta_s") is not None:
            parts.append(f"ETA {format_duration(st['eta_s'])}")
        line += "\n" + ", ".join(parts)
    fault = st.get("fault")
    if st.get("state") == "paused" and isinstance(fault, dict):
        line += (f"\nPAUSED BY A FAULT of {fault.get('instrument')}: {fault.get('error')} "
                 "(fix it, then `shotpair resume`; or `shotpair abort`)")
    if st.get("output"):
        line += f"\nfile {st['output']}"
    if st.get("last_scan_state") and st.get("state") == "idle":
        line += f"\nlast scan {st['last_scan_state']}" + (f": {st['last_error']}" if st.get("last_error") else "")
    return line


def _client(args: argparse.Namespace) -> ControlClient:
    """The control client the options describe; ConfigError (exit 2) for missing or unreadable keys."""
    return ControlClient(args.control, timeout_s=args.timeout, keys=client_keys_from_args(args))


def _print(args: argparse.Namespace, reply: dict[str, Any], human: str) -> int:
    print(json.dumps(reply, indent=2, sort_keys=True) if args.json else human)
    return 0


def _status(args: argparse.Namespace) -> int:
    with _client(args) as c:
        st = c.status()
    return _print(args, st, describe_status(st))


def _start(args: argparse.Namespace) -> int:
    try:
        with open(args.scan, "rb") as fh:
            doc = tomllib.load(fh)
    except FileNotFoundError:
        raise ConfigError("file not found", file=args.scan) from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"not valid TOML: {exc}", file=args.scan) from None
    if "scan" not in doc:
        raise ConfigError("no [scan] section", file=args.scan, key_path="scan")
    with _client(args) as c:
        reply = c.start(scan=doc["scan"], output=args.output)
    human = (f"started scan {reply['scan_id']}: {reply['sweeps']} sweep(s) x {reply['n_points']} points, about "
             f"{format_duration(reply['estimated_duration_s'])}; writing {reply['output']} on the daemon's computer")
    return _print(args, reply, human)


def _simple(cmd: str):  # noqa: ANN202
    def run(args: argparse.Namespace) -> int:
        with _client(args) as c:
            extra = {"reason": args.reason} if getattr(args, "reason", None) else {}
            if cmd == "move":
                extra = {"delay_ps": args.delay_ps}
            reply = c.request(cmd, **extra).header
        human = f"{cmd}: accepted, state {reply.get('state')}"
        if cmd == "move":
            human = f"moving to {reply['delay_ps']:g} ps ({reply['position_mm']:.4f} mm)"
        if cmd == "shutdown":
            human = "shutdown: the daemon stops (after leaving the bench safe)"
        return _print(args, reply, human)

    return run


def add_remote_commands(sub: Any) -> None:
    """Add the verbs that talk to a daemon to an argparse sub-parser set."""

    def common(p: argparse.ArgumentParser) -> None:
        p.add_argument("--control", metavar="ENDPOINT", default=DEFAULT_CONTROL,
                       help=f"the daemon's control endpoint (default {DEFAULT_CONTROL})")
        p.add_argument("--timeout", type=float, default=5.0, metavar="S", help="seconds to wait for an answer")
        p.add_argument("--json", action="store_true", help="print the raw reply as JSON")
        add_client_key_options(p)

    p = sub.add_parser("status", help="ask a running daemon where it is")
    common(p)
    p.set_defaults(func=_status)
    p = sub.add_parser("start", help="send a scan (TOML file with [scan]) to a running daemon")
    p.add_argument("scan", help="TOML file with a [scan] section")
    p.add_argument("--output", help="output file on the daemon's computer (overrides scan.output)")
    common(p)
    p.set_defaults(func=_start)
    for name, text in (("pause", "pause the running scan between blocks (shutter closed)"),
                       ("resume", "resume a paused scan (the interrupted point is measured again)"),
                       ("abort", "abort the running scan (the file is kept, marked aborted)"),
                       ("shutdown", "stop the daemon (leaves the bench safe)")):
        p = sub.add_parser(name, help=text)
        if name == "abort":
            p.add_argument("--reason", help="why, stored in the file")
        common(p)
        p.set_defaults(func=_simple(name))
    p = sub.add_parser("move", help="move the delay stage to a delay while idle (alignment)")
    p.add_argument("delay_ps", type=float, help="delay in ps")
    common(p)
    p.set_defaults(func=_simple("move"))
