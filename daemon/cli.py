"""The `shotpair` command line: check a configuration, run a scan on the bench it describes.

User mistakes end with one line on stderr and a non-zero exit, never a traceback. The scan logic lives
in runner.py; this module parses arguments, prints, and maps outcomes to exit codes.
"""

from __future__ import annotations

import argparse
import contextlib
import logging
import signal
import sys
from typing import Any, Callable, Iterator, Sequence

import numpy as np

from shotpair.drivers.errors import ConfigError, ShotpairError, StorageError

from .auth import ServerKeys, server_keys_for
from .bench import Bench, build_bench
from .client import DEFAULT_CONTROL
from .instrument_report import format_report, probe_instruments
from .config import BenchSettings, LoadedConfig, StreamSettings, check_output, load_config
from .events import LogEvent, PointSaved, ScanEnded, ScanStarted
from .plan import ScanPlan, make_plan
from .progress import ProgressPrinter, format_duration
from .keys_cmd import add_keys_command
from .monitor import add_monitor_command
from .remote import add_remote_commands
from .simulate_cmd import add_simulate_command
from .runner import ScanJob, new_scan_id
from .server import Daemon
from .store import check_scan_space, software_version, unique_path
from .summary import summarise

__all__ = ["main", "build_parser"]

EXIT_OK, EXIT_SCAN_FAILED, EXIT_USAGE, EXIT_INTERRUPTED = 0, 1, 2, 130


def _load(args: argparse.Namespace) -> tuple[LoadedConfig, LoadedConfig]:
    """(scan config, bench config): the bench comes from --bench if given, else from the same file."""
    cfg = load_config(args.config)
    bench_cfg = load_config(args.bench) if getattr(args, "bench", None) else cfg
    if getattr(args, "bench", None) and bench_cfg.config.bench is None:
        raise ConfigError("no [bench] section", file=bench_cfg.path, key_path="bench")
    return cfg, bench_cfg


def _plan(cfg: LoadedConfig, bench_cfg: LoadedConfig) -> ScanPlan:
    return make_plan(cfg.require_scan(), bench_cfg.bench, cfg.path)


def _axis_line(b: BenchSettings, plan: ScanPlan) -> str:
    if plan.axis == "generator" and plan.generator_settings_ps is not None and b.delay_generator is not None:
        g = plan.generator_settings_ps
        return (f"generator     settings {g.min():.6g} to {g.max():.6g} ps (time zero {b.delay_generator.time_zero_ps:g} "
                f"ps, range {list(b.delay_generator.range_ps)} ps); the stage waits at time zero "
                f"({b.delay_axis.time_zero_mm} mm)")
    return (f"stage         {plan.positions_mm.min():.4f} to {plan.positions_mm.max():.4f} mm "
            f"(travel {list(b.delay_axis.travel_mm)} mm, {b.delay_axis.passes} passes, "
            f"{b.delay_axis.delay_line().ps_per_mm:.5f} ps/mm, time zero {b.delay_axis.time_zero_mm} mm)")


def describe_plan(cfg: LoadedConfig, bench_cfg: LoadedConfig, plan: ScanPlan, output: str) -> str:
    b = bench_cfg.bench
    scan = cfg.require_scan()
    w = b.detector.wavelengths_nm()
    lines = [
        f"config        {cfg.path}" + (f" (bench from {bench_cfg.path})" if bench_cfg is not cfg else ""),
        f"bench         {b.name}: {b.repetition_rate_hz:g} Hz, detector {b.detector.pixels} px "
        f"{w.min():.1f}-{w.max():.1f} nm, drivers " + ", ".join(f"{k}={v.driver}" for k, v in
                                                              b.instrument_sections().items()),
        f"scan          {scan.title!r}: {plan.sweeps} sweep(s) x {plan.n_points} delay points, order {scan.order}",
        f"delays        {plan.delays_ps.min():.6g} to {plan.delays_ps.max():.6g} ps",
        _axis_line(b, plan),
        f"shots         {plan.shots_per_point} per point, {plan.total_shots:,} in all"
        + (f" (incl. {plan.dark_shots} dark)" if plan.dark_shots else ""),
        f"duration      about {format_duration(plan.estimated_duration_s())} at {b.repetition_rate_hz:g} Hz "
        f"(moves {format_duration(plan.travel_time_s())})",
        f"output        {output}",
    ]
    return "\n".join(lines)


def cmd_check(args: argparse.Namespace) -> int:
    cfg, bench_cfg = _load(args)
    if cfg.config.scan is None:
        print(f"{cfg.path}: valid bench {bench_cfg.bench.name!r} (no [scan] section)")
    else:
        plan = _plan(cfg, bench_cfg)
        print(describe_plan(cfg, bench_cfg, plan, cfg.require_scan().output))
    bench = build_bench(bench_cfg.bench, bench_cfg.config.simulation or cfg.config.simulation, realtime=False,
                        config_path=bench_cfg.path)
    if args.offline:
        print("configuration is valid (instruments not contacted: --offline)")
        return EXIT_OK
    print("instruments (asked, nothing moved):")
    reports = probe_instruments(bench)
    print(format_report(reports))
    failed = [r.name for r in reports if not r.ok]
    if failed:
        print(f"shotpair: error: configuration is valid but {', '.join(failed)} did not answer as expected",
              file=sys.stderr)
        return EXIT_SCAN_FAILED
    print("configuration is valid; every instrument answers")
    return EXIT_OK


def _summary(ev: ScanEnded, last: PointSaved | None) -> str:
    text = f"scan {ev.state}" + (f" ({ev.reason})" if ev.reason else "") + f": {ev.points_done} point(s) in {ev.path}"
    if last is not None:
        c = last.combined
        err = float(np.nanmedian(c.delta_od_error)) if np.any(np.isfinite(c.delta_od_error)) else float("nan")
        text += (f"\nlast point: median error {err:.2e} ΔOD, median noise/floor "
                 f"{float(np.nanmedian(c.excess_noise)):.2f}, {last.shots_per_s:.0f} shots/s")
    for p in ev.safe_problems:
        text += f"\nWARNING: {p}"
    return text


@contextlib.contextmanager
def _handling_signals(handler: Callable[[int, object], None]) -> Iterator[None]:
    """SIGINT and SIGTERM call ``handler`` inside the block; the previous handlers come back after it."""
    previous = {sig: signal.signal(sig, handler) for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        yield
    finally:
        for sig, old in previous.items():
            signal.signal(sig, old)


def _server_keys(args: argparse.Namespace, bench_cfg: LoadedConfig, stream: StreamSettings) -> ServerKeys | None:
    """The daemon's CURVE keys for the endpoints it will bind (--data/--control win over [stream]), or None.
    Called before the bench is built: an open endpoint without keys, or a bad keys folder, moves nothing."""
    data, control = getattr(args, "data", None), getattr(args, "control", None)
    endpoints = {"--data" if data else "stream.data_endpoint": data or stream.data_endpoint,
                 "--control" if control else "stream.control_endpoint": control or stream.control_endpoint}
    return server_keys_for(stream.auth.enabled, stream.auth.keys_dir, endpoints, config_path=bench_cfg.path,
                           cli_keys_dir=getattr(args, "keys", None))


def _bind(daemon: Daemon, args: argparse.Namespace, *, fallback: bool) -> None:
    try:
        daemon.bind(getattr(args, "data", None), getattr(args, "control", None))
    except ConfigError as exc:
        if not fallback:
            raise
        # The embedded run must not fail because another program holds the port: take free ones.
        print(f"warning: {exc}; using free ports instead", file=sys.stderr)
        daemon.bind("tcp://127.0.0.1:*", "tcp://127.0.0.1:*")


def cmd_run(args: argparse.Namespace) -> int:
    cfg, bench_cfg = _load(args)
    scan = cfg.require_scan()
    plan = _plan(cfg, bench_cfg)
    target = args.output or scan.output
    check_output(target, cfg.path, "--output" if args.output else "scan.output")
    output = unique_path(target)
    det = bench_cfg.bench.detector
    # Refused here (exit 2) before the bench is built; the runner repeats the check and reports a warning.
    check_scan_space(output, plan.n_points, det.pixels, plan.sweeps, has_reference=det.has_reference,
                     text_bytes=len(cfg.text))
    stream = bench_cfg.config.stream or cfg.stream
    keys = _server_keys(args, bench_cfg if bench_cfg.config.stream else cfg, stream)
    bench = build_bench(bench_cfg.bench, (bench_cfg.config.simulation or cfg.config.simulation),
                        realtime=not args.fast, seed=scan.seed, config_path=bench_cfg.path)
    print(describe_plan(cfg, bench_cfg, plan, str(output)), file=sys.stderr)
    return _serve_job(args, bench, bench_cfg, stream, keys, ScanJob(cfg, scan, plan, output, new_scan_id()))


def _serve_job(args: argparse.Namespace, bench: Bench, bench_cfg: LoadedConfig, stream: StreamSettings,
               keys: ServerKeys | None, job: ScanJob, verb: str = "writing") -> int:
    """Serve one scan on a built bench until it ends (the body of `run` and `resume`):
    live data and control on the stream endpoints, progress on stderr, Ctrl-C or SIGTERM stop it safely.
    Returns the exit code: 0 complete, 130 interrupted, 1 failed."""
    bench.connect()
    daemon = Daemon(bench, bench_cfg, stream, keys)
    try:
        _bind(daemon, args, fallback=True)
        print(f"live data on {daemon.data_endpoint}, control on {daemon.control_endpoint} "
              "(`shotpair monitor` can attach)", file=sys.stderr, flush=True)
        progress = ProgressPrinter()
        outcome: dict[str, object] = {}
        interrupted: list[str] = []

        def on_event(ev: object) -> None:
            if isinstance(ev, ScanStarted):
                print(f"{verb} {ev.path}", file=sys.stderr, flush=True)
            elif isinstance(ev, PointSaved):
                outcome["last"] = ev
                progress.point(ev)
            elif isinstance(ev, LogEvent):
                progress.finish()
                print(f"{ev.level}: {ev.message}", file=sys.stderr, flush=True)
            elif isinstance(ev, ScanEnded):
                progress.finish()
                print(_summary(ev, outcome.get("last")), file=sys.stderr, flush=True)  # type: ignore[arg-type]
                outcome["state"] = ev.state

        def on_signal(signum: int, frame: object) -> None:
            if not interrupted:
                progress.finish()
                print("interrupted: stopping safely, the file is kept (marked aborted)...", file=sys.stderr)
                daemon.runner.abort("interrupted by the user (Ctrl-C)" if signum == signal.SIGINT
                                    else f"stopped by {signal.Signals(signum).name}")
            interrupted.append(signal.Signals(signum).name)

        with _handling_signals(on_signal):
            daemon.listeners.append(on_event)
            daemon.exit_when_idle = True
            daemon.start_job(job)
            daemon.serve()
    finally:
        daemon.close()
        bench.disconnect()
    if outcome.get("state") == "complete":
        return EXIT_OK
    return EXIT_INTERRUPTED if interrupted else EXIT_SCAN_FAILED


def cmd_resume(args: argparse.Namespace) -> int:
    """Continue an interrupted scan in its file: checks everything first, then re-measures the dark and
    measures the points that are not in the file yet, in the scan's own order."""
    from .resume import copy_for_resume, prepare_resume, resumed_simulation
    from .store import ScanStore

    rp = prepare_resume(args.file, bench_path=args.bench)
    if args.output:
        target = copy_for_resume(rp.path, args.output)
        print(f"copied {rp.path} to {target}; the copy is resumed, the original left as it is", file=sys.stderr)
        rp = prepare_resume(target, bench_path=args.bench)
    for note in rp.notes:
        print(f"warning: {note}", file=sys.stderr)
    if rp.next_point is None:
        # every point is in (the run ended between its last point and its end mark): no instrument needed
        problems = ScanStore.open_existing(rp.path).finish("complete")
        for p in problems:
            print(f"shotpair: error: {p}", file=sys.stderr)
        print(f"scan complete: all {rp.points_total} point(s) were already in {rp.path}", file=sys.stderr)
        return EXIT_SCAN_FAILED if problems else EXIT_OK
    cfg, job = rp.config, rp.job
    scan = cfg.require_scan()
    keys = _server_keys(args, cfg, cfg.stream)
    bench = build_bench(cfg.bench, resumed_simulation(cfg.config.simulation, scan.seed, rp.points_done),
                        realtime=not args.fast, config_path=cfg.path)
    print(describe_plan(cfg, cfg, job.plan, str(rp.path)), file=sys.stderr)
    sweep, position = rp.next_point
    print(f"resuming: {rp.points_done} of {rp.points_total} points are in the file (it was {rp.state}"
          + (f": {rp.reason}" if rp.reason else "") + f"); continuing at sweep {sweep + 1} point {position + 1} "
          "after measuring the dark again", file=sys.stderr)
    return _serve_job(args, bench, cfg, cfg.stream, keys, job, verb="continuing")


def _add_file_resume(sub: Any) -> None:
    """`shotpair resume` resumes a paused scan on a daemon (daemon/remote.py); `shotpair resume FILE`
    continues an interrupted scan in its file, here. One verb for both, told apart by FILE."""
    p = sub.choices["resume"]
    remote = p.get_default("func")
    p.description = ("Without FILE: resume the paused scan of a running daemon. With FILE: continue an interrupted "
                     "scan (a crash, Ctrl-C, a full disk) in its own file on the bench it records; the points in "
                     "the file are kept and the rest measured in the scan's order.")
    p.add_argument("file", nargs="?", help="the HDF5 file of an interrupted scan to continue here")
    g = p.add_argument_group("continuing a scan in FILE (--control and --keys then serve, as for `run`)")
    g.add_argument("--bench", help="take the bench from this TOML file instead of the settings stored in FILE")
    g.add_argument("--output", "-o", metavar="NEW", help="copy FILE to NEW and continue the copy (FILE is untouched)")
    g.add_argument("--fast", action="store_true", help="simulated bench: run as fast as the computer allows")
    g.add_argument("--data", metavar="ENDPOINT", help="publish live data here (default from the stored [stream])")

    def dispatch(args: argparse.Namespace) -> int:
        if args.file is None:
            return int(remote(args))
        if args.control == DEFAULT_CONTROL:  # the client default: serve on the stored [stream] endpoint instead
            args.control = None
        return cmd_resume(args)

    p.set_defaults(func=dispatch)
    for action in getattr(sub, "_choices_actions", []):
        if action.dest == "resume":
            action.help = "resume a paused scan on a daemon; with FILE, continue an interrupted scan in its file"


def cmd_serve(args: argparse.Namespace) -> int:
    bench_cfg = load_config(args.config)
    if bench_cfg.config.bench is None:
        raise ConfigError("no [bench] section: the daemon needs a bench", file=bench_cfg.path, key_path="bench")
    keys = _server_keys(args, bench_cfg, bench_cfg.stream)
    bench = build_bench(bench_cfg.bench, bench_cfg.config.simulation, realtime=not args.fast,
                        config_path=bench_cfg.path)
    bench.connect()
    daemon = Daemon(bench, bench_cfg, bench_cfg.stream, keys)
    try:
        _bind(daemon, args, fallback=False)
        if keys is not None:
            print(keys.describe(), file=sys.stderr, flush=True)
        print(f"serving bench {bench.settings.name!r}: data {daemon.data_endpoint}, control {daemon.control_endpoint}",
              flush=True)

        def on_signal(signum: int, frame: object) -> None:
            daemon.request_stop()

        with _handling_signals(on_signal):
            daemon.serve()
    finally:
        daemon.close()
        bench.disconnect()
    print("daemon stopped; bench left safe", flush=True)
    return EXIT_OK


def cmd_show(args: argparse.Namespace) -> int:
    print(summarise(args.file))
    return EXIT_OK


def cmd_plot(args: argparse.Namespace) -> int:
    from .figures import parse_numbers
    from .plotfile import plot_file

    target = plot_file(args.file, args.save_png, show=args.show, delays_ps=parse_numbers(args.delays, "--delays"),
                       wavelengths_nm=parse_numbers(args.wavelengths, "--wavelengths"))
    if target is not None:
        print(f"wrote {target}")
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="shotpair", description="Acquisition daemon for pump-probe spectrometers.")
    parser.add_argument("--version", action="version", version=f"shotpair {software_version()}")
    parser.add_argument("-v", "--verbose", action="store_true", help="log debugging detail to stderr")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = sub.add_parser("check", help="validate a configuration, print the scan plan and ask every instrument "
                       "who and how it is (moves nothing)")
    p.add_argument("config", help="TOML file with [scan] and/or [bench]")
    p.add_argument("--bench", help="take the bench from this file instead")
    p.add_argument("--offline", action="store_true", help="only validate: do not contact the instruments")
    p.set_defaults(func=cmd_check)

    p = sub.add_parser("run", help="run the scan in a configuration on its bench, here and now")
    p.add_argument("config", help="TOML file with [scan] (and [bench], [simulation])")
    p.add_argument("--bench", help="take the bench from this file instead")
    p.add_argument("--output", "-o", help="output HDF5 file (overrides scan.output)")
    p.add_argument("--fast", action="store_true", help="simulated bench: run as fast as the computer allows")
    p.add_argument("--data", metavar="ENDPOINT", help="publish live data here (default from [stream])")
    p.add_argument("--control", metavar="ENDPOINT", help="accept control here (default from [stream])")
    p.add_argument("--keys", metavar="DIR", help="authenticate clients with the keys in DIR (`shotpair keys`; "
                   "overrides [stream.auth])")
    p.set_defaults(func=cmd_run)

    p = sub.add_parser("serve", help="run the daemon: connect the bench, wait for commands, stream data")
    p.add_argument("config", help="TOML file with [bench] (and [stream], [simulation])")
    p.add_argument("--data", metavar="ENDPOINT", help="data stream endpoint (default from [stream])")
    p.add_argument("--control", metavar="ENDPOINT", help="control endpoint (default from [stream])")
    p.add_argument("--fast", action="store_true", help="simulated bench: run as fast as the computer allows")
    p.add_argument("--keys", metavar="DIR", help="authenticate clients with the keys in DIR (`shotpair keys`; "
                   "overrides [stream.auth])")
    p.set_defaults(func=cmd_serve)

    add_remote_commands(sub)
    _add_file_resume(sub)
    add_monitor_command(sub)
    add_keys_command(sub)
    add_simulate_command(sub)

    p = sub.add_parser("show", help="summarise a scan file: state, grid, ΔOD range, errors, rejected pairs")
    p.add_argument("file", help="an HDF5 file written by shotpair")
    p.set_defaults(func=cmd_show)

    p = sub.add_parser("plot", help="draw a scan file: ΔOD map, spectra, kinetics, noise vs floor (needs [plot])")
    p.add_argument("file", help="an HDF5 file written by shotpair")
    p.add_argument("--save-png", metavar="PATH", help="image to write (default: the file name with .png)")
    p.add_argument("--show", action="store_true", help="open a window instead of writing an image")
    p.add_argument("--delays", metavar="PS,PS,...", help="delays (ps) for the spectra panel")
    p.add_argument("--wavelengths", metavar="NM,NM,...", help="wavelengths (nm) for the kinetics panel")
    p.set_defaults(func=cmd_plot)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.DEBUG if args.verbose else logging.WARNING,
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    try:
        return int(args.func(args))
    except ShotpairError as exc:
        print(f"shotpair: error: {exc}", file=sys.stderr)
        return EXIT_USAGE if isinstance(exc, (ConfigError, StorageError)) else EXIT_SCAN_FAILED
    except KeyboardInterrupt:
        print("shotpair: interrupted", file=sys.stderr)
        return EXIT_INTERRUPTED


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
