"""Serve a simulated rack over real pseudo-terminals or TCP sockets on 127.0.0.1.

One pty (``/dev/pts/N``) or one listening port per board; the daemon opens it with pyserial like
any USB serial adapter or serial-over-TCP converter. One thread multiplexes every link with a
selector, feeds bytes to the rack, and sends replies when the simulated board has them ready.
"""

from __future__ import annotations

import contextlib
import heapq
import json
import os
import selectors
import socket
import threading
import time
import tty
from pathlib import Path
from typing import Literal

from meshsim.rack import SimRack

Transport = Literal["pty", "tcp"]
TICK_S = 0.005


class _Link:
    """One board's end of the cable: a pty master, or a listening socket and its client."""

    def __init__(self, board_id: str) -> None:
        self.board_id = board_id
        self.fd: int | None = None  # where bytes are read and written
        self.url = ""
        self.keep: list[int] = []  # fds held open for the link's lifetime (the pty slave)
        self.listener: socket.socket | None = None
        self.client: socket.socket | None = None


class RackServer:
    """Runs a rack's links until :meth:`stop`; a context manager."""

    def __init__(self, rack: SimRack, transport: Transport, host: str = "127.0.0.1", base_port: int = 0) -> None:
        if transport not in ("pty", "tcp"):
            raise ValueError(f"transport must be pty or tcp, got {transport!r}")
        if host not in ("127.0.0.1", "localhost", "::1"):
            raise ValueError("the simulator serves on loopback only")
        self.rack = rack
        self.transport = transport
        self.selector = selectors.DefaultSelector()
        self.links: dict[str, _Link] = {}
        self._outbox: list[tuple[float, int, str, bytes]] = []
        self._counter = 0
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        for number, board_id in enumerate(rack.boards):
            link = _Link(board_id)
            if transport == "pty":
                self._open_pty(link)
            else:
                self._open_tcp(link, host, base_port + number if base_port else 0)
            self.links[board_id] = link

    def _open_pty(self, link: _Link) -> None:
        master, slave = os.openpty()
        tty.setraw(slave)
        os.set_blocking(master, False)
        link.fd = master
        link.keep = [slave]  # holding the slave open keeps the master readable between clients
        link.url = os.ttyname(slave)
        self.selector.register(master, selectors.EVENT_READ, link)

    def _open_tcp(self, link: _Link, host: str, port: int) -> None:
        listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        listener.bind((host, port))
        listener.listen(1)
        listener.setblocking(False)
        link.listener = listener
        link.url = f"socket://{host}:{listener.getsockname()[1]}"
        self.selector.register(listener, selectors.EVENT_READ, link)

    # ------------------------------------------------------------------ running

    def ports(self) -> dict[str, str]:
        """Board id -> URL for pyserial."""
        return {b: link.url for b, link in self.links.items()}

    def write_ports_file(self, path: str | Path) -> None:
        """Write the ports as JSON atomically, so a reader never sees half a file."""
        target = Path(path)
        tmp = target.with_name(target.name + ".tmp")
        tmp.write_text(json.dumps(self.ports(), indent=2) + "\n", encoding="utf-8")
        os.replace(tmp, target)

    def start(self) -> RackServer:
        self._thread = threading.Thread(target=self.run, name="meshsim-serve", daemon=True)
        self._thread.start()
        return self

    def run(self) -> None:
        while not self._stop.is_set():
            timeout = TICK_S
            if self._outbox:
                timeout = min(timeout, max(self._outbox[0][0] - time.monotonic(), 0.0))
            for key, _ in self.selector.select(timeout):
                self._readable(key.fileobj, key.data)
            self.rack.tick()
            self._flush()

    def stop(self) -> None:
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=5)
        for link in self.links.values():
            for sock in (link.client, link.listener):
                if sock is not None:
                    with contextlib.suppress(OSError):
                        sock.close()
            for fd in ([link.fd] if self.transport == "pty" and link.fd is not None else []) + link.keep:
                with contextlib.suppress(OSError):
                    os.close(fd)
        self.selector.close()

    def __enter__(self) -> RackServer:
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()

    # ------------------------------------------------------------------ I/O

    def _readable(self, fileobj: object, link: _Link) -> None:
        if fileobj is link.listener and link.listener is not None:
            try:
                client, _ = link.listener.accept()
            except BlockingIOError:
                return
            if link.client is not None:  # a new connection replaces the old, as serial servers do
                self.selector.unregister(link.client)
                link.client.close()
            client.setblocking(False)
            client.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)
            link.client = client
            link.fd = client.fileno()
            self.selector.register(client, selectors.EVENT_READ, link)
            return
        try:
            data = os.read(link.fd, 4096) if link.fd is not None else b""
        except (BlockingIOError, InterruptedError):
            return
        except OSError:
            data = b""
        if not data:
            if link.client is not None:  # TCP peer went away
                self.selector.unregister(link.client)
                link.client.close()
                link.client, link.fd = None, None
            return
        sim_now = self.rack.clock.now()
        wall_now = time.monotonic()
        for ready, reply in self.rack.exchange(link.board_id, data):
            due = wall_now + self.rack.clock.wall_seconds(max(ready - sim_now, 0.0))
            self._counter += 1
            heapq.heappush(self._outbox, (due, self._counter, link.board_id, reply))

    def _flush(self) -> None:
        now = time.monotonic()
        while self._outbox and self._outbox[0][0] <= now:
            _, _, board_id, reply = heapq.heappop(self._outbox)
            link = self.links[board_id]
            if link.fd is None:
                continue  # nobody connected: the bytes fall on the floor, as on a real line
            try:
                os.write(link.fd, reply)
            except (BlockingIOError, OSError):
                continue
