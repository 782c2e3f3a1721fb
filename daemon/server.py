"""The daemon's I/O loop: one thread owns every ZeroMQ socket (they are not thread-safe).

It answers control requests on a ROUTER socket, turns the runner's events into data-stream messages on a
PUB socket, and sends a status heartbeat. It never waits for a client: PUB drops messages for slow
subscribers (they see the gap in ``seq``), and requests are answered from state kept here, so replies
stay fast while a scan runs. Instruments are touched only by the runner's worker thread.
"""

from __future__ import annotations

import logging
import math
import queue
import time
from typing import Any, Callable

import numpy as np
import zmq

from shotpair.drivers.errors import (ConfigError, InstrumentError, LimitError, ProtocolError, ShotpairError,
                                     StateError, StorageError)

from . import protocol
from .auth import DaemonAuthenticator, ServerKeys, check_command, rights_of, server_keys_for
from .bench import Bench
from .config import LoadedConfig, StreamSettings, check_output, load_config, parse_config
from .events import (BlockProgress, Event, InstrumentFault, LogEvent, MoveDone, PointSaved, ScanEnded, ScanStarted,
                     StateChanged, SweepDone)
from .plan import make_plan
from .runner import Runner, ScanJob, new_scan_id
from .states import TRANSITIONS, RunState
from .store import check_scan_space, software_version, unique_path

__all__ = ["Daemon", "TRANSPORT_LIMIT_FACTOR"]

#: The control socket's ZMQ_MAXMSGSIZE is this many times ``[stream] max_request_bytes``: a request up to
#: that size still gets a ``bad_request`` reply; a longer frame makes libzmq drop the connection unread.
TRANSPORT_LIMIT_FACTOR = 4

log = logging.getLogger(__name__)

_ERROR_CODE = [(ConfigError, "config_error"), (LimitError, "bad_argument"), (StateError, "illegal_state"),
               (InstrumentError, "instrument_error"), (StorageError, "storage_error"),
               (ProtocolError, "bad_request")]


_VERSION = software_version()  # asked once: importlib.metadata costs ~1.5 ms per call


def _code(exc: ShotpairError) -> str:
    if isinstance(exc, ProtocolError):
        return exc.code
    for kind, code in _ERROR_CODE:
        if isinstance(exc, kind):
            return code
    return "internal_error"


class Daemon:
    """Serves one connected bench: control requests in, data stream out.

    Parameters
    ----------
    bench, bench_config:
        The connected bench and the configuration it came from (for scan plans and messages).
    stream:
        Endpoints and intervals; endpoints may use ``tcp://127.0.0.1:*`` for a free port
        (see :attr:`data_endpoint` / :attr:`control_endpoint` after :meth:`bind`).
    keys:
        CURVE keys (daemon/auth.py): both sockets then admit only the listed clients, and a read-only
        client's commands other than status/snapshot are answered ``forbidden``. When None, :meth:`bind`
        takes them from ``stream.auth`` and refuses endpoints other computers could reach without them.
    """

    def __init__(self, bench: Bench, bench_config: LoadedConfig, stream: StreamSettings,
                 keys: ServerKeys | None = None) -> None:
        self.bench = bench
        self.bench_config = bench_config
        self.stream = stream
        self.keys = keys
        self._auth: DaemonAuthenticator | None = None
        self._peer: tuple[str | None, str | None] = (None, None)  # rights, name of the request being answered
        self.runner = Runner(bench, block_interval_s=stream.block_interval_s)
        self.listeners: list[Callable[[Event], None]] = []
        self.exit_when_idle = False
        self._ctx: zmq.Context[Any] | None = None
        self._pub: zmq.Socket[Any] | None = None
        self._router: zmq.Socket[Any] | None = None
        self._seq = 0
        self._stop = False
        self.data_endpoint = ""
        self.control_endpoint = ""
        self._status: dict[str, Any] = {"scan_id": None, "output": None, "sweep": None, "sweeps": None,
                                        "point": None, "points": None, "points_done": 0, "points_total": 0,
                                        "delay_ps": None, "shots_per_s": None, "rejected_fraction": None,
                                        "excess_noise_median": None, "eta_s": None, "last_error": None,
                                        "last_scan_state": None, "last_scan_id": None, "fault": None, "retries": 0}
        self._map: dict[str, np.ndarray] | None = None
        self._job_delays = np.zeros(0)
        self._last_status_s = 0.0

    # ------------------------------------------------------------------ sockets
    def bind(self, data_endpoint: str | None = None, control_endpoint: str | None = None) -> None:
        """Create and bind both sockets (linger 0). Raises ConfigError naming the endpoint that failed, or,
        before creating anything, when an endpoint other computers can reach would go without keys."""
        data_endpoint = data_endpoint or self.stream.data_endpoint
        control_endpoint = control_endpoint or self.stream.control_endpoint
        if self.keys is None:
            self.keys = server_keys_for(self.stream.auth.enabled, self.stream.auth.keys_dir,
                                        {"stream.data_endpoint": data_endpoint,
                                         "stream.control_endpoint": control_endpoint},
                                        config_path=self.bench_config.path)
        self._ctx = zmq.Context()
        if self.keys is not None:  # the ZAP handler runs before any socket can take a connection
            self._auth = DaemonAuthenticator(self._ctx, self.keys)
            self._auth.start()
        self._pub = self._ctx.socket(zmq.PUB)
        self._pub.setsockopt(zmq.LINGER, 0)
        self._pub.setsockopt(zmq.SNDHWM, self.stream.send_high_water_mark)
        if self.stream.send_buffer_bytes is not None:
            self._pub.setsockopt(zmq.SNDBUF, self.stream.send_buffer_bytes)
        self._router = self._ctx.socket(zmq.ROUTER)
        self._router.setsockopt(zmq.LINGER, 0)
        self._router.setsockopt(zmq.ROUTER_MANDATORY, 0)
        # A frame this long is not even read: libzmq drops the connection (docs/protocol.md section 1).
        self._router.setsockopt(zmq.MAXMSGSIZE, self.stream.max_request_bytes * TRANSPORT_LIMIT_FACTOR)
        if self._auth is not None:
            self._auth.secure(self._pub)
            self._auth.secure(self._router)
        for sock, endpoint, key in ((self._pub, data_endpoint, "stream.data_endpoint"),
                                    (self._router, control_endpoint, "stream.control_endpoint")):
            try:
                sock.bind(endpoint)
            except zmq.ZMQError as exc:
                self.close()
                raise ConfigError(f"cannot bind ({exc.strerror})", key_path=key, value=endpoint,
                                  allowed="a free port on this computer, e.g. tcp://127.0.0.1:5561") from None
        self.data_endpoint = self._pub.getsockopt_string(zmq.LAST_ENDPOINT)
        self.control_endpoint = self._router.getsockopt_string(zmq.LAST_ENDPOINT)

    def close(self) -> None:
        """Close the sockets (linger 0, so this never hangs) and the context."""
        for sock in (self._pub, self._router):
            if sock is not None:
                sock.close(linger=0)
        if self._auth is not None:  # its ZAP socket lives on the context: stopped before the context ends
            self._auth.stop()
            self._auth = None
        if self._ctx is not None:
            self._ctx.term()
        self._pub = self._router = self._ctx = None

    def request_stop(self) -> None:
        """Stop the loop at its next turn (safe from a signal handler)."""
        self._stop = True

    # ------------------------------------------------------------------ loop
    def serve(self) -> None:
        """Run the I/O loop until :meth:`request_stop` or a ``shutdown`` command; then leave the bench safe."""
        assert self._router is not None and self._pub is not None, "bind() first"
        poller = zmq.Poller()
        poller.register(self._router, zmq.POLLIN)
        self._publish_status()
        try:
            while not self._stop:
                ready = dict(poller.poll(timeout=20))
                if self._router in ready:
                    self._handle_requests()
                self._drain_events()
                now = time.monotonic()
                if now - self._last_status_s >= self.stream.status_interval_s:
                    self._publish_status()
        finally:
            self._shutdown()

    def _shutdown(self) -> None:
        self.runner.close()
        self._drain_events()
        self.bench.make_safe()
        self._publish_status()

    def _drain_events(self, limit: int = 1000) -> None:
        for _ in range(limit):
            try:
                ev = self.runner.events.get_nowait()
            except queue.Empty:
                return
            self._on_event(ev)

    # ------------------------------------------------------------------ publishing
    def _publish(self, topic: str, scan_id: str | None, fields: dict[str, Any] | None = None,
                 arrays: dict[str, np.ndarray] | None = None) -> None:
        if self._pub is None:
            return
        frames = protocol.encode_data(topic, self._seq, scan_id, time.time(), fields, arrays)
        try:
            self._pub.send_multipart(frames, flags=zmq.NOBLOCK, copy=False)
        except zmq.Again:
            pass  # beyond the high-water mark: dropped, the subscriber sees the gap in seq
        self._seq += 1

    def status(self) -> dict[str, Any]:
        s = dict(self._status)
        s.update({"state": self.runner.state.value, "version": _VERSION, "protocol": protocol.PROTOCOL_VERSION,
                  "bench": self.bench.settings.name, "data_endpoint": self.data_endpoint,
                  "control_endpoint": self.control_endpoint, "dropped_events": self.runner.dropped_events})
        return s

    def _publish_status(self) -> None:
        self._last_status_s = time.monotonic()
        self._publish("status", self._status["scan_id"], self.status())

    def _on_event(self, ev: Event) -> None:
        st = self._status
        if isinstance(ev, ScanStarted):
            px = self.bench.settings.detector.pixels
            st.update(scan_id=ev.scan_id, output=ev.path, sweeps=ev.sweeps, points=ev.n_points, points_done=0,
                      points_total=ev.n_points * ev.sweeps, eta_s=ev.estimated_duration_s, sweep=None, point=None,
                      delay_ps=None, last_error=None, shots_per_s=None, rejected_fraction=None,
                      excess_noise_median=None, fault=None, retries=0)
            self._map = {"delta_od": np.full((ev.n_points, px), np.nan),
                         "delta_od_errors": np.full((ev.n_points, px), np.nan),
                         "delay_ps": self._job_delays, "wavelength_nm": self.bench.settings.detector.wavelengths_nm(),
                         "completed": np.zeros((ev.sweeps, ev.n_points), dtype=bool)}
            self._publish("scan", ev.scan_id, {"event": "started", "path": ev.path, "n_points": ev.n_points,
                                               "sweeps": ev.sweeps, "shots_per_point": ev.shots_per_point,
                                               "estimated_duration_s": ev.estimated_duration_s},
                          {"delay_ps": self._map["delay_ps"], "wavelength_nm": self._map["wavelength_nm"]})
        elif isinstance(ev, PointSaved):
            r, c = ev.result, ev.combined
            total = r.pairs + r.rejected_pairs
            excess = float(np.nanmedian(c.excess_noise)) if np.isfinite(c.excess_noise).any() else None
            st.update(sweep=ev.sweep + 1, point=ev.position_in_sweep + 1, points_done=ev.points_done,
                      delay_ps=ev.delay_ps, shots_per_s=ev.shots_per_s, eta_s=ev.eta_s,
                      rejected_fraction=r.rejected_pairs / total if total else 0.0, excess_noise_median=excess)
            if self._map is not None:
                self._map["delta_od"][ev.index] = c.delta_od
                self._map["delta_od_errors"][ev.index] = c.delta_od_error
                self._map["completed"][ev.sweep, ev.index] = True
            self._publish("point", ev.scan_id,
                          {"sweep": ev.sweep, "index": ev.index, "position_in_sweep": ev.position_in_sweep,
                           "delay_ps": ev.delay_ps, "points_done": ev.points_done, "points_total": ev.points_total,
                           "pairs": r.pairs, "rejected_pairs": r.rejected_pairs, "gaps": r.gaps, "shots": r.shots,
                           "eta_s": ev.eta_s, "shots_per_s": ev.shots_per_s, "phase_breaks": r.phase_breaks,
                           "unpaired_shots": r.unpaired_shots, "retries": ev.retries, "restarts": ev.restarts},
                          {"delta_od": r.delta_od, "delta_od_error": r.delta_od_error, "noise_floor": r.floor,
                           "mean_counts_pump_on": r.mean_counts_on, "mean_counts_pump_off": r.mean_counts_off,
                           "masked": r.masked, "combined_delta_od": c.delta_od, "combined_delta_od_error": c.delta_od_error,
                           "combined_noise_floor": c.floor})
        elif isinstance(ev, BlockProgress):
            r = ev.result
            self._publish("block", ev.scan_id, {"sweep": ev.sweep, "index": ev.index, "delay_ps": ev.delay_ps,
                                                "shots_done": ev.shots_done, "shots_target": ev.shots_target,
                                                "pairs": r.pairs},
                          {"delta_od": r.delta_od, "delta_od_error": r.delta_od_error})
        elif isinstance(ev, SweepDone):
            self._publish("sweep", ev.scan_id, {"sweep": ev.sweep, "sweeps": ev.sweeps},
                          {"delta_od": ev.delta_od, "delta_od_error": ev.delta_od_error, "pairs": ev.pairs,
                           "delay_ps": self._map["delay_ps"] if self._map else np.zeros(0),
                           "wavelength_nm": self.bench.settings.detector.wavelengths_nm()})
        elif isinstance(ev, InstrumentFault):
            st["retries"] = ev.retries
            if ev.action in ("paused", "still_failing"):
                st["fault"] = {"instrument": ev.instrument, "error": ev.error, "time": ev.time_s}
                st["last_error"] = ev.error
            elif ev.action == "cleared":
                st["fault"] = None
            self._publish_status()
        elif isinstance(ev, ScanEnded):
            st.update(last_scan_state=ev.state, last_scan_id=ev.scan_id, last_error=ev.reason or None, eta_s=0.0,
                      fault=None)
            if self.exit_when_idle:
                self._stop = True
            self._publish("scan", ev.scan_id, {"event": ev.state, "path": ev.path, "reason": ev.reason,
                                               "points_done": ev.points_done, "safe_problems": ev.safe_problems})
            self._publish_status()
        elif isinstance(ev, LogEvent):
            self._publish("log", ev.scan_id or st["scan_id"], {"level": ev.level, "message": ev.message})
        elif isinstance(ev, MoveDone):
            if ev.error:
                st["last_error"] = ev.error
                self._publish("log", None, {"level": "error", "message": f"move to {ev.delay_ps} ps: {ev.error}"})
            else:
                self._publish("log", None, {"level": "info", "message": f"moved to {ev.delay_ps} ps "
                                                                         f"({ev.position_mm:.4f} mm)"})
        elif isinstance(ev, StateChanged):
            self._publish_status()
        for listener in self.listeners:
            listener(ev)

    # ------------------------------------------------------------------ control
    def _handle_requests(self, limit: int = 100, budget_s: float = 0.02) -> None:
        """Answer at most ``limit`` waiting requests, and stop early once ``budget_s`` has been spent, so
        that a flood (or a run of slow requests) never holds back the events and heartbeats of the loop.
        ZeroMQ fair-queues the clients: each turn takes requests from every client in rotation."""
        assert self._router is not None
        deadline = time.monotonic() + budget_s
        for _ in range(limit):
            if time.monotonic() > deadline:
                return
            try:
                frames = self._router.recv_multipart(flags=zmq.NOBLOCK, copy=self._auth is None)
            except zmq.Again:
                return
            if self._auth is not None:  # the rights the ZAP handler gave this connection ride on its frames
                self._peer = rights_of(frames[-1])
                frames = [f.bytes for f in frames]
            identity, body = frames[0], frames[1:]
            try:
                reply = self._reply_to(body)
            except Exception:  # noqa: BLE001 - even the error reply failed: answer without echoing anything
                log.exception("could not answer a request")
                reply = protocol.encode_error("internal_error", "the reply could not be built", None,
                                              state=self.runner.state.value)
            try:
                self._router.send_multipart([identity, *reply], flags=zmq.NOBLOCK, copy=False)
            except zmq.ZMQError as exc:  # the client went away: nothing to do
                log.debug("reply not sent: %s", exc)

    def _reply_to(self, body: list[bytes]) -> list[Any]:
        request_id = None
        max_bytes = self.stream.max_request_bytes
        try:
            # Framing and size are checked before a byte is parsed; the id is then echoed only if it nests
            # shallowly enough to be encoded again (a request nested deeper is refused whole).
            req = protocol.decode_request(body, max_bytes)
            request_id = req.get("id")
            cmd = req["cmd"]
            handler = getattr(self, f"_cmd_{cmd}", None) if cmd.isidentifier() else None
            if handler is None:
                shown = cmd if len(cmd) <= 40 else cmd[:40] + "..."
                raise ProtocolError(f"unknown command {shown!r}; commands: {', '.join(self.commands())}",
                                    code="unknown_command")
            if self._auth is not None:
                check_command(*self._peer, cmd)
            fields, arrays = handler(req)
            return protocol.encode_reply(request_id, arrays, **fields)
        except ShotpairError as exc:
            if request_id is None:
                request_id = _id_of(body, max_bytes)
            return protocol.encode_error(_code(exc), str(exc), request_id, state=self.runner.state.value)
        except Exception as exc:  # noqa: BLE001 - a bug answers with an error; the daemon keeps running
            log.exception("error while answering a request")
            return protocol.encode_error("internal_error", f"{type(exc).__name__}: {exc}", request_id,
                                         state=self.runner.state.value)

    @classmethod
    def commands(cls) -> list[str]:
        return sorted(name[5:] for name in dir(cls) if name.startswith("_cmd_"))

    def _require(self, action: str) -> None:
        """Raise StateError (naming what is allowed now) unless ``action`` is legal in the present state."""
        machine = self.runner.machine
        if not machine.can(action):
            allowed = sorted(a for (st, a) in TRANSITIONS if st is machine.state and a in self.commands())
            raise StateError(f"allowed now: {', '.join(allowed) or 'status, snapshot, shutdown'}",
                             state=machine.state.value, action=action)

    def _cmd_status(self, req: dict[str, Any]) -> tuple[dict[str, Any], None]:
        return self.status(), None

    def _cmd_start(self, req: dict[str, Any]) -> tuple[dict[str, Any], None]:
        self._require("start")
        if isinstance(req.get("scan"), dict):
            cfg = parse_config({"scan": req["scan"]}, "<start request>", _toml_text(req["scan"]))
        elif isinstance(req.get("path"), str):
            cfg = load_config(req["path"])
        else:
            raise ProtocolError("start needs 'scan' (a scan table) or 'path' (a TOML file on the daemon's "
                                "computer)", code="bad_argument")
        scan = cfg.require_scan()
        plan = make_plan(scan, self.bench.settings, cfg.path)
        if req.get("output") is not None and not isinstance(req.get("output"), str):
            raise ProtocolError("'output' must be a file path (a string)", code="bad_argument")
        target = req.get("output") or scan.output
        check_output(target, cfg.path, "output" if req.get("output") else "scan.output")
        output = unique_path(target)
        det = self.bench.settings.detector
        check_scan_space(output, plan.n_points, det.pixels, plan.sweeps, has_reference=det.has_reference,
                         text_bytes=len(cfg.text))  # a scan that cannot fit is refused in the reply
        job = ScanJob(cfg, scan, plan, output, new_scan_id())
        self._job_delays = plan.delays_ps
        self.runner.start(job)
        self._publish_status()
        return {"scan_id": job.scan_id, "output": str(output), "n_points": plan.n_points, "sweeps": plan.sweeps,
                "estimated_duration_s": plan.estimated_duration_s()}, None

    def start_job(self, job: ScanJob) -> None:
        """Start a scan built by the caller (the embedded `run`)."""
        self._job_delays = job.plan.delays_ps
        self.runner.start(job)

    def _cmd_pause(self, req: dict[str, Any]) -> tuple[dict[str, Any], None]:
        self._require("pause")
        self.runner.pause()
        return {"state": self.runner.state.value}, None

    def _cmd_resume(self, req: dict[str, Any]) -> tuple[dict[str, Any], None]:
        self._require("resume")
        self.runner.resume()
        return {"state": self.runner.state.value}, None

    def _cmd_abort(self, req: dict[str, Any]) -> tuple[dict[str, Any], None]:
        self._require("abort")
        reason = req.get("reason")
        self.runner.abort(str(reason) if reason else "aborted by a client")
        return {"state": self.runner.state.value}, None

    def _cmd_snapshot(self, req: dict[str, Any]) -> tuple[dict[str, Any], dict[str, np.ndarray] | None]:
        fields = {"scan_id": self._status["scan_id"], "state": self.runner.state.value}
        if self._map is None:
            return {**fields, "empty": True}, None
        return {**fields, "empty": False}, dict(self._map)

    def _cmd_move(self, req: dict[str, Any]) -> tuple[dict[str, Any], None]:
        delay = req.get("delay_ps")
        try:  # a JSON integer may be far beyond a double (np.isfinite raised TypeError for 10**400)
            finite = not isinstance(delay, bool) and isinstance(delay, (int, float)) and math.isfinite(float(delay))
        except OverflowError:
            finite = False
        if not finite:
            raise ProtocolError("move needs a finite number 'delay_ps'", code="bad_argument")
        self._require("move")
        position = self.runner.move(float(delay))
        self._publish_status()
        # the state the command entered (a fast move may already be over when this reply is built)
        return {"delay_ps": float(delay), "position_mm": position, "state": RunState.MOVING.value}, None

    def _cmd_shutdown(self, req: dict[str, Any]) -> tuple[dict[str, Any], None]:
        self._stop = True
        return {"state": self.runner.state.value, "stopping": True}, None


def _id_of(body: list[bytes], max_bytes: int) -> Any:
    """The ``id`` of a request that failed to decode, when it is one frame of at most ``max_bytes`` holding a
    JSON object with an ``id`` that nests no deeper than a request may (else None: nothing else is parsed)."""
    if len(body) != 1 or len(body[0]) > max_bytes:
        return None
    try:
        obj = protocol.loads_json(bytes(body[0]))
    except (ValueError, RecursionError):
        return None
    found = obj.get("id") if isinstance(obj, dict) else None
    return found if protocol.nesting_depth(found, protocol.MAX_REQUEST_DEPTH) <= protocol.MAX_REQUEST_DEPTH else None


def _toml_text(table: dict[str, Any]) -> str:
    """A readable copy of a scan sent as JSON, stored in the file as the config text."""
    import json

    return "# scan sent over the control socket (JSON)\n" + json.dumps({"scan": table}, indent=2)

