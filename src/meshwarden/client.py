"""`meshwarden.Client`: the Python API for experiment scripts and notebooks.

    from meshwarden.client import Client

    with Client("tcp://127.0.0.1:7640") as mw:
        mw.arm()
        mw.set({"g05.kappa": 0.5, "g05.phase": 1.2})
        print(mw.monitors(average=4)["m07"]["watts"])
        for topic, message in mw.subscribe(["event"], timeout_s=5):
            ...

A DEALER socket (a REQ socket locks up after one lost reply). Every request carries this
client's id and a fresh request id; after a timeout the same request is sent again, and the
daemon answers a repeat from its cache, so a command is never applied twice. A daemon that does
not answer is reported as :class:`~meshwarden.errors.UnreachableError` after
``timeout_s x (retries + 1)``; the next call tries again, so the client works once the daemon
is back. Refusals raise the matching :class:`~meshwarden.errors.MeshwardenError` subclass.

A request larger than ``max_message_bytes`` (the daemon's ``service.max_message_bytes``, 1 MiB
unless configured otherwise) is refused here, before it is sent, with code ``too_large``.
"""

from __future__ import annotations

import itertools
import json
import time
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import zmq
import zmq.auth

from meshwarden import errors
from meshwarden.errors import BusError, MeshwardenError, UnreachableError
from meshwarden.service.keyfiles import check_secret_key_file

LONG_OPS = {"set", "disarm", "restore", "calibrate", "scan", "lock_start", "lock_stop"}
DEFAULT_MAX_MESSAGE_BYTES = 1 << 20  # the daemon's default service.max_message_bytes


def _error_classes() -> dict[str, type[MeshwardenError]]:
    out: dict[str, type[MeshwardenError]] = {}
    for value in vars(errors).values():
        if isinstance(value, type) and issubclass(value, MeshwardenError) and isinstance(value.code, str):
            out.setdefault(value.code, value)
    return out


_BY_CODE = _error_classes()


def error_from_reply(error: dict[str, Any]) -> MeshwardenError:
    """The exception a reply's error object stands for (a plain MeshwardenError if unknown)."""
    code = str(error.get("code", "error"))
    message = str(error.get("message", ""))
    details = error.get("details") or {}
    cls = _BY_CODE.get(code)
    if cls is None or cls in (errors.ConfigError, errors.BusError):
        exc = MeshwardenError(message, **details)
        exc.code = code
        return exc
    return cls(message, **details)


class Client:
    """A connection to one daemon. Not thread-safe; use one per thread."""

    def __init__(
        self,
        endpoint: str = "tcp://127.0.0.1:7640",
        telemetry: str | None = None,
        *,
        timeout_s: float = 2.0,
        retries: int = 2,
        ramp_timeout_s: float = 120.0,
        client_id: str | None = None,
        key_file: str | Path | None = None,
        server_key_file: str | Path | None = None,
        max_message_bytes: int = DEFAULT_MAX_MESSAGE_BYTES,
    ) -> None:
        self.endpoint = endpoint
        self.telemetry_endpoint = telemetry or _next_port(endpoint)
        self.timeout_s = timeout_s
        self.retries = retries
        self.ramp_timeout_s = ramp_timeout_s
        self.max_message_bytes = max_message_bytes
        self.client_id = client_id or f"c-{uuid.uuid4().hex[:12]}"
        self._ids = itertools.count(1)
        self._context: zmq.Context[zmq.Socket[bytes]] = zmq.Context.instance()
        self._curve: tuple[bytes, bytes, bytes] | None = None
        if key_file is not None and server_key_file is not None:
            check_secret_key_file(Path(key_file))  # refused if others can read it, as ssh does
            public, secret = zmq.auth.load_certificate(str(key_file))
            server_public, _ = zmq.auth.load_certificate(str(server_key_file))
            if secret is None:
                raise MeshwardenError(f"{key_file} holds no secret key")
            self._curve = (public, secret, server_public)
        self._socket = self._new_socket(zmq.DEALER, endpoint)

    def _new_socket(self, kind: int, endpoint: str) -> zmq.Socket[bytes]:
        sock: zmq.Socket[bytes] = self._context.socket(kind)
        sock.setsockopt(zmq.LINGER, 0)
        if self._curve is not None:
            sock.curve_publickey, sock.curve_secretkey, sock.curve_serverkey = self._curve
        sock.connect(endpoint)
        return sock

    # ------------------------------------------------------------------ life cycle

    def close(self) -> None:
        self._socket.close(0)

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ------------------------------------------------------------------ requests

    def request(self, op: str, **args: Any) -> Any:
        """Send one operation and return its result; raises on refusal or when unreachable."""
        request_id = f"{next(self._ids)}-{uuid.uuid4().hex[:8]}"
        try:
            message = json.dumps(
                {"v": 1, "id": request_id, "client": self.client_id, "op": op, "args": args}, allow_nan=False
            ).encode()
        except ValueError as exc:  # NaN or infinity: refused here, with the reason, before sending
            raise BusError("bad_request", f"{op}: {exc} (NaN and infinity are not values)") from None
        if len(message) > self.max_message_bytes:
            raise BusError(
                "too_large",
                f"{op}: request of {len(message)} bytes exceeds the daemon's {self.max_message_bytes}-byte cap "
                "(service.max_message_bytes); not sent",
                size=len(message),
                limit=self.max_message_bytes,
            )
        long_op = op in LONG_OPS and args.get("wait", True)
        timeout = max(self.timeout_s, self.ramp_timeout_s) if long_op else self.timeout_s
        for _attempt in range(self.retries + 1):
            self._socket.send(message)
            deadline = time.monotonic() + timeout
            while (left := deadline - time.monotonic()) > 0:
                if not self._socket.poll(int(left * 1000) + 1):
                    break
                reply = json.loads(self._socket.recv())
                if reply.get("id") is None and reply.get("ok") is False:
                    # the daemon could not read an id (one request is in flight at a time):
                    # this refusal is the answer, not something to wait out
                    raise error_from_reply(reply.get("error") or {})
                if reply.get("id") != request_id:
                    continue  # a late reply to an earlier, abandoned request
                if reply.get("ok"):
                    return reply.get("result")
                raise error_from_reply(reply.get("error") or {})
        raise UnreachableError(
            f"no reply from {self.endpoint} within {timeout:g} s x {self.retries + 1} tries", endpoint=self.endpoint
        )

    def wait_ready(self, timeout_s: float = 30.0) -> dict[str, Any]:
        """Poll ``status`` until the daemon answers (just started, or restarting); raises
        UnreachableError after ``timeout_s``."""
        deadline = time.monotonic() + timeout_s
        saved = self.timeout_s, self.retries
        self.timeout_s, self.retries = min(self.timeout_s, 0.5), 0
        try:
            while True:
                try:
                    return self.status()
                except UnreachableError:
                    if time.monotonic() > deadline:
                        raise
        finally:
            self.timeout_s, self.retries = saved

    def status(self) -> dict[str, Any]:
        result: dict[str, Any] = self.request("status")
        return result

    def get(self) -> dict[str, Any]:
        result: dict[str, Any] = self.request("get")
        return result

    def snapshot(self) -> dict[str, Any]:
        result: dict[str, Any] = self.request("snapshot")
        return result

    def arm(self) -> dict[str, Any]:
        result: dict[str, Any] = self.request("arm")
        return result

    def disarm(self) -> dict[str, Any]:
        result: dict[str, Any] = self.request("disarm")
        return result

    def estop(self, reason: str = "") -> dict[str, str]:
        result: dict[str, str] = self.request("estop", reason=reason)
        return result

    def restore(self) -> dict[str, Any]:
        result: dict[str, Any] = self.request("restore")
        return result

    def recover(self, board: str) -> dict[str, Any]:
        """Bring a faulted board back after its link was fixed (admin; daemon disarmed)."""
        result: dict[str, Any] = self.request("recover", board=board)
        return result

    def set(self, values: dict[str, float], *, volts: bool = False, wait: bool = True) -> dict[str, Any]:
        """Set actuators (``c03``) or gate attributes (``g05.kappa``, ``g05.phase``); logical
        values by default, volts with ``volts=True``. Returns what was applied."""
        result: dict[str, Any] = self.request("set", values=values, volts=volts, wait=wait)
        return result

    def monitors(self, average: int = 1, integration_s: float = 1e-3) -> dict[str, dict[str, float]]:
        result: dict[str, dict[str, float]] = self.request("monitors", average=average, integration_s=integration_s)
        return result

    def events(self, since: int = 0, limit: int = 100) -> list[dict[str, Any]]:
        result: list[dict[str, Any]] = self.request("events", since=since, limit=limit)
        return result

    def lease(self, targets: list[str], ttl_s: float = 30.0) -> dict[str, Any]:
        result: dict[str, Any] = self.request("lease", targets=targets, ttl_s=ttl_s)
        return result

    def release(self, targets: list[str]) -> dict[str, Any]:
        result: dict[str, Any] = self.request("release", targets=targets)
        return result

    def cancel(self, job: str) -> dict[str, Any]:
        result: dict[str, Any] = self.request("cancel", job=job)
        return result

    def jobs(self) -> list[dict[str, Any]]:
        result: list[dict[str, Any]] = self.request("jobs")
        return result

    # ------------------------------------------------------------------ telemetry

    def telemetry_socket(self, topics: list[str] | None = None) -> zmq.Socket[bytes]:
        """A SUB socket on the telemetry endpoint subscribed to ``topics`` (all when None), for
        callers that poll it alongside other work (the command line's progress display)."""
        sub = self._new_socket(zmq.SUB, self.telemetry_endpoint)
        for topic in topics or [""]:
            sub.setsockopt(zmq.SUBSCRIBE, topic.encode())
        return sub

    def subscribe(
        self,
        topics: list[str] | None = None,
        timeout_s: float | None = None,
        settle_s: float = 0.2,
        deadline_s: float | None = None,
    ) -> Iterator[tuple[str, dict[str, Any]]]:
        """Telemetry messages as (topic, message), in order; when subscribed to every topic, a gap
        in ``seq`` is reported as a ``("gap", {"missed": n})`` item. ``timeout_s`` is an *idle*
        timeout: the iteration ends after that long without a message; ``deadline_s`` ends it
        that long after the call however busy the stream is. The subscription is made before this
        returns, and ``settle_s`` gives it time to reach the daemon (ZeroMQ's "slow joiner"), so
        what you do next is seen."""
        end = None if deadline_s is None else time.monotonic() + deadline_s
        sub = self.telemetry_socket(topics)
        time.sleep(settle_s)
        return self._messages(sub, topics is None, timeout_s, end)

    @staticmethod
    def _messages(
        sub: zmq.Socket[bytes], every_topic: bool, timeout_s: float | None, end: float | None = None
    ) -> Iterator[tuple[str, dict[str, Any]]]:
        last_seq: int | None = None

        def wait_ms() -> int | None:
            waits = [w for w in (timeout_s, None if end is None else end - time.monotonic()) if w is not None]
            return None if not waits else max(0, int(min(waits) * 1000))

        try:
            while (end is None or time.monotonic() < end) and sub.poll(wait_ms()):
                raw_topic, body = sub.recv_multipart()
                message = json.loads(body)
                seq = int(message.get("seq", 0))
                if last_seq is not None and every_topic and seq > last_seq + 1:
                    yield "gap", {"missed": seq - last_seq - 1}
                last_seq = seq
                yield raw_topic.decode(), message
        finally:
            sub.close(0)

    # ------------------------------------------------------------------ fault scans

    def scan(self, targets: list[str] | None = None, wait: bool = True) -> dict[str, Any]:
        """Run a fault scan of ``targets`` (actuator or gate ids; None: every actuator). With ``wait`` the
        result holds the report under ``"scan"``; without, the job id to follow on the ``job`` topic."""
        args: dict[str, Any] = {"wait": wait}
        if targets:
            args["targets"] = list(targets)
        result: dict[str, Any] = self.request("scan", **args)
        return result

    def scans(self, limit: int = 100) -> list[dict[str, Any]]:
        """Past scans, newest first, each with its counts of findings."""
        result: list[dict[str, Any]] = self.request("scans", limit=limit)
        return result

    # ------------------------------------------------------------------ calibration

    def calibrate(
        self, targets: list[str] | None = None, points: int | None = None, activate: bool = True, wait: bool = True
    ) -> dict[str, Any]:
        """Calibrate actuators or gates in place (none: the whole chip); with ``wait`` the report
        ``{"version", "activated", "frames", "actuators": {ID: {"status", "residual", "points",
        "frames", "reason"}}}``, else ``{"job", "state"}`` (follow it with :meth:`job`)."""
        args: dict[str, Any] = {"activate": activate, "wait": wait}
        if targets:
            args["targets"] = list(targets)
        if points is not None:
            args["points"] = points
        result: dict[str, Any] = self.request("calibrate", **args)
        return result

    def calibrations(self) -> list[dict[str, Any]]:
        """Stored calibration versions (the configuration's own first), which is active."""
        result: list[dict[str, Any]] = self.request("calibrations")
        return result

    def calibration(self, version: str, sweeps: bool = False) -> dict[str, Any]:
        """One version's manifest: date, method, per-actuator outcome; with ``sweeps`` also its
        measured points per actuator (``"sweeps"``, None if the version kept none) and the chip's
        ``"layout"`` and ``"gates"`` (what ``calibrate --plot`` draws)."""
        args: dict[str, Any] = {"version": version}
        if sweeps:
            args["sweeps"] = True
        result: dict[str, Any] = self.request("calibration_show", **args)
        return result

    def activate_calibration(self, version: str) -> dict[str, Any]:
        """Switch to a stored version (no output moves); which actuators now mean another value."""
        result: dict[str, Any] = self.request("calibration_activate", version=version)
        return result

    def job(self, job: str) -> dict[str, Any]:
        """One job's state, progress and, once finished, its result."""
        result: dict[str, Any] = self.request("job", job=job)
        return result

    # ------------------------------------------------------------------ locks

    def lock_start(
        self,
        name: str,
        actuator: str,
        monitor: str,
        hold: str,
        against: str | None = None,
        dither: float | None = None,
        bandwidth_hz: float | None = None,
    ) -> dict[str, Any]:
        """Start a lock holding ``hold`` ("max", "min" or "fraction=X" with ``against``) at ``monitor``
        by moving ``actuator``; returns ``{name: description}``."""
        args: dict[str, Any] = {"name": name, "actuator": actuator, "monitor": monitor, "hold": hold}
        for key, value in (("against", against), ("dither", dither), ("bandwidth_hz", bandwidth_hz)):
            if value is not None:
                args[key] = value
        result: dict[str, Any] = self.request("lock_start", **args)
        return result

    def locks(self) -> dict[str, dict[str, Any]]:
        """Every lock, running or stopped: ``{name: {"state", "actuator", "monitor", "hold", "residual",
        "value", ...}}``."""
        result: dict[str, dict[str, Any]] = self.request("locks")
        return result

    def lock_stop(self, name: str | None = None) -> list[str]:
        """Stop the lock ``name``, or every running lock; returns the names stopped."""
        result = self.request("lock_stop", **({} if name is None else {"name": name}))
        return list(result["stopped"])


def _next_port(endpoint: str) -> str:
    """The telemetry endpoint by convention: the command port + 1."""
    if endpoint.startswith("tcp://") and endpoint.rsplit(":", 1)[-1].isdigit():
        host, port = endpoint.rsplit(":", 1)
        return f"{host}:{int(port) + 1}"
    return endpoint + ".pub"
