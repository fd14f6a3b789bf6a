"""The sockets: a ROUTER for commands, a PUB for telemetry, CURVE when beyond loopback.

Per message: frame count and size caps, then the schema, then the role of the sender's key,
then dispatch in its own task (so a slow ramp never blocks status or estop). Replies are cached
per (authenticated identity, client, request id) in a :class:`~meshwarden.service.replies.ReplyCache`
bounded in bytes: a client that resends after losing a reply gets the cached reply (or waits for
the one still being computed) and the command is never applied twice. The ROUTER is
``ROUTER_MANDATORY``: a reply to a client that has gone raises instead of vanishing, and is
journaled as undeliverable.

Size: a message over ``service.max_message_bytes`` is answered ``too_large``, with its request id
read from the first few KiB, so the client learns why at once. ZeroMQ itself is told to drop a
peer only at :data:`DROP_FACTOR` times the cap (at least :data:`DROP_FLOOR_BYTES`): below that the
daemon holds the message just long enough to answer it.
"""

from __future__ import annotations

import asyncio
import contextlib
import time
from typing import Any

import zmq
import zmq.asyncio
import zmq.auth
from zmq.auth.asyncio import AsyncioAuthenticator

from meshwarden.config.model import Config
from meshwarden.controller import Controller
from meshwarden.errors import BusError, ConfigError, ConfigIssue, MeshwardenError
from meshwarden.logsetup import get_logger
from meshwarden.service.handlers import Dispatcher
from meshwarden.service.identity import LOCAL, Sender
from meshwarden.service.keyfiles import write_keypair
from meshwarden.service.preflight import check_exposure, load_server_key
from meshwarden.service.replies import ReplyCache, request_digest
from meshwarden.service.schema import (
    MAX_REASON_CHARS,
    Request,
    best_effort_id,
    id_from_prefix,
    parse_request,
    reply_error,
    reply_ok,
)
from meshwarden.service.telemetry import Telemetry

__all__ = ["Bus", "load_allow_list", "write_keypair"]

MAX_FRAMES = 3
DROP_FACTOR = 16
DROP_FLOOR_BYTES = 16 << 20


def load_allow_list(config: Config) -> dict[bytes, tuple[str, str]]:
    """z85 public key -> (client name, role), from the key files the configuration names."""
    allowed: dict[bytes, tuple[str, str]] = {}
    for client in config.service.clients:
        try:
            public, _ = zmq.auth.load_certificate(str(client.public_key_file))
        except (OSError, ValueError) as exc:
            raise ConfigError(
                [
                    ConfigIssue(
                        str(client.public_key_file),
                        0,
                        "service.clients",
                        f"cannot read the public key of '{client.name}': {exc}",
                    )
                ]
            ) from None
        allowed[public] = (client.name, client.role)
    return allowed


class _KeyRoles:
    """ZAP credentials provider: only keys on the allow-list get in."""

    def __init__(self, allowed: dict[bytes, tuple[str, str]]) -> None:
        self.allowed = allowed

    def callback(self, domain: str, key: bytes) -> bool:
        return key in self.allowed


class Bus:
    """Owns the two sockets and serves requests until :meth:`close`."""

    def __init__(self, controller: Controller, config: Config, bind: str | None = None, pub: str | None = None) -> None:
        self.controller = controller
        self.config = config
        self.bind_endpoint = bind or config.service.bind
        self.pub_endpoint = pub or config.service.pub
        self.max_bytes = config.service.max_message_bytes
        self.drop_bytes = max(self.max_bytes * DROP_FACTOR, DROP_FLOOR_BYTES)
        self.log = get_logger(component="bus")
        self.context = zmq.asyncio.Context()
        self.auth: AsyncioAuthenticator | None = None
        self.roles = _KeyRoles({})
        self.curve = config.service.server_secret_key_file is not None
        self.router = self.context.socket(zmq.ROUTER)
        self.publisher = self.context.socket(zmq.PUB)
        self.telemetry = Telemetry(self.publisher)
        self.dispatcher = Dispatcher(controller, self.telemetry)
        self.replies = ReplyCache(config.service.reply_cache_bytes)
        self._tasks: set[asyncio.Task[Any]] = set()
        self._serve_task: asyncio.Task[None] | None = None
        self._ticker: asyncio.Task[None] | None = None

    # ------------------------------------------------------------------ setup

    def start(self) -> None:
        check_exposure(self.config, self.bind_endpoint, self.pub_endpoint)  # serve() checked before the boards too
        if self.curve:
            assert self.config.service.server_secret_key_file is not None
            public, secret = load_server_key(self.config.service.server_secret_key_file)
            self.roles.allowed = load_allow_list(self.config)
            self.auth = AsyncioAuthenticator(self.context)
            self.auth.start()
            self.auth.configure_curve_callback(domain="*", credentials_provider=self.roles)
            for sock in (self.router, self.publisher):
                sock.curve_secretkey = secret
                sock.curve_publickey = public
                sock.curve_server = True
        self.router.setsockopt(zmq.ROUTER_MANDATORY, 1)
        self.router.setsockopt(zmq.MAXMSGSIZE, self.drop_bytes)
        self.router.setsockopt(zmq.LINGER, 0)
        self.publisher.setsockopt(zmq.LINGER, 0)
        self.publisher.setsockopt(zmq.SNDHWM, 10000)
        for sock, endpoint in ((self.router, self.bind_endpoint), (self.publisher, self.pub_endpoint)):
            try:
                sock.bind(endpoint)
            except zmq.ZMQError as exc:
                raise MeshwardenError(f"cannot listen on {endpoint}: {exc.strerror}", endpoint=endpoint) from exc
        self.bound = str(self.router.getsockopt_string(zmq.LAST_ENDPOINT))
        self.pub_bound = str(self.publisher.getsockopt_string(zmq.LAST_ENDPOINT))
        self._serve_task = asyncio.create_task(self._serve(), name="bus")
        self._ticker = asyncio.create_task(self._tick(), name="telemetry")
        self.log.info("bus ready", commands=self.bound, telemetry=self.pub_bound, curve=self.curve)

    def reload_keys(self) -> int:
        """Re-read the allow-list from the configuration file; returns how many keys are allowed."""
        if not self.curve or self.config.source is None:
            return 0
        from meshwarden.config import load_config

        fresh = load_config(self.config.source)
        self.roles.allowed = load_allow_list(fresh)
        self.controller.journal.event("keys_reloaded", count=len(self.roles.allowed))
        return len(self.roles.allowed)

    async def close(self) -> None:
        await self.dispatcher.locks.close()  # every lock stops (and lets go of its claim) first
        self.telemetry.close()
        if self.dispatcher._on_event in self.controller.listeners:
            self.controller.listeners.remove(self.dispatcher._on_event)
        for task in (self._serve_task, self._ticker, *self._tasks):
            if task is not None:
                task.cancel()
        await asyncio.gather(
            *(t for t in (self._serve_task, self._ticker, *self._tasks) if t is not None), return_exceptions=True
        )
        self.router.close(0)
        self.publisher.close(0)
        if self.auth is not None:
            self.auth.stop()
        self.context.term()

    # ------------------------------------------------------------------ serving

    async def _serve(self) -> None:
        while True:
            frames = await self.router.recv_multipart(copy=False)
            identity = frames[0].bytes
            user = ""
            with contextlib.suppress(zmq.ZMQError, KeyError):
                user = str(frames[-1].get("User-Id") or "")
            body_frames = [f.bytes for f in frames[1:]]
            if len(body_frames) == 2 and body_frames[0] == b"":
                body_frames = body_frames[1:]  # a REQ-style envelope
            task = asyncio.create_task(self._one(identity, body_frames, user))
            self._tasks.add(task)
            task.add_done_callback(self._tasks.discard)

    def _sender(self, user: str) -> Sender:
        """Who sent a message: on loopback without CURVE everyone is an unauthenticated admin."""
        if not self.curve:
            return Sender(LOCAL, "admin", authenticated=False)
        entry = self.roles.allowed.get(user.encode())
        if entry is None:  # revoked after connecting
            return Sender("revoked", "none", authenticated=True)
        name, role = entry
        return Sender(name, role, authenticated=True)

    async def _one(self, identity: bytes, body_frames: list[bytes], user: str) -> None:
        sender = self._sender(user)
        request_id: str | None = None
        request: Request | None = None
        try:
            if len(body_frames) != 1:
                raise BusError("too_many_frames", f"a request is one frame, got {len(body_frames)}")
            data = body_frames[0]
            if len(data) > self.max_bytes:
                request_id = id_from_prefix(data)
                raise BusError(
                    "too_large",
                    f"message of {len(data)} bytes exceeds the {self.max_bytes}-byte cap",
                    size=len(data),
                    limit=self.max_bytes,
                )
            request_id = best_effort_id(data)
            if sender.role == "none":
                raise BusError("forbidden", "this client's key is no longer on the allow-list")
            request = parse_request(data)
            reply = await self._cached(request, sender)
        except MeshwardenError as exc:
            if sender.role != "none":
                self._journal_refusal(sender, request, request_id, exc)
            reply = reply_error(request_id, exc)
        except Exception as exc:  # last line: the daemon stays up and says so
            self.log.exception("internal error while serving a request")
            reply = reply_error(request_id, MeshwardenError(f"internal error: {type(exc).__name__}: {exc}"))
        try:
            await self.router.send_multipart([identity, reply])
        except zmq.ZMQError as exc:
            self.controller.journal.event(
                "reply_undeliverable",
                client=sender.holder(request.client) if request else sender.identity,
                error=str(exc),
            )

    def _journal_refusal(
        self, sender: Sender, request: Request | None, request_id: str | None, exc: MeshwardenError
    ) -> None:
        """A request refused before dispatch (the dispatcher journals its own refusals)."""
        self.controller.journal.event(
            "command",
            client=sender.holder(request.client) if request else sender.identity,
            op=request.op if request else "?",
            ok=False,
            code=exc.code,
            reason=exc.message[:MAX_REASON_CHARS],
            request=request_id,
            **({"label": request.client} if request else {}),
        )

    async def _cached(self, request: Request, sender: Sender) -> bytes:
        key = (sender.identity, request.client, request.id)
        digest = request_digest(request.op, request.args)
        try:
            earlier = self.replies.get(key, digest)  # a reused id with another request is refused here
        except BusError:
            if request.op != "estop":
                raise
            return await self._run(request, sender)  # an estop is never refused: run it, uncached
        if earlier is not None:
            return await asyncio.shield(earlier)  # a resend: same answer, no second run
        self.replies.add(key, digest)
        try:
            reply = await self._run(request, sender)
        except asyncio.CancelledError:
            self.replies.forget(key)
            raise
        self.replies.settle(key, reply)
        return reply

    async def _run(self, request: Request, sender: Sender) -> bytes:
        try:
            result = await self.dispatcher.handle(request, sender)
            return reply_ok(request.id, result)
        except MeshwardenError as exc:
            return reply_error(request.id, exc)
        except Exception as exc:
            self.log.exception("internal error in a handler", op=request.op)
            return reply_error(request.id, MeshwardenError(f"internal error: {type(exc).__name__}: {exc}"))

    async def _tick(self) -> None:
        """Heartbeat once a second; monitor samples at the configured rate."""
        rate = self.config.service.telemetry_rate_hz
        period = 1.0 / rate if rate > 0 else None
        next_beat = next_sample = time.monotonic()
        while True:
            now = time.monotonic()
            if now >= next_beat:
                await self.telemetry.publish(
                    "heartbeat", {"armed": self.controller.armed, "estopped": self.controller.estopped}
                )
                next_beat = now + 1.0
            if period is not None and now >= next_sample and self.config.chip.monitors:
                next_sample = now + period
                try:
                    sample = await self.controller.read_monitors(1)
                    await self.telemetry.publish("monitors", {"monitors": sample})
                except MeshwardenError as exc:
                    await self.telemetry.publish("event", {"kind": "monitor_read_failed", "error": exc.message})
            await asyncio.sleep(min(0.05, period or 0.05))
