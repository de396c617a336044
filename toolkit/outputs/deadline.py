"""A time limit for a whole exchange with a server (an HTTP request, an SMTP conversation)."""

from __future__ import annotations

import socket
import threading
import time


class Deadline:
    """A time limit for a whole request: when it passes, every socket of the request is shut down.

    A socket timeout bounds each read, not the request, so a server that trickles its answer a byte
    at a time could hold a POST for ever; shutting the socket down ends whatever the request is
    doing (connecting through a proxy, sending, waiting for the status, reading headers or body).
    """

    def __init__(self, seconds: float) -> None:
        self.seconds = seconds
        self.ends = time.monotonic() + seconds
        self.expired = False
        self._sockets: list[socket.socket] = []
        self._lock = threading.Lock()
        self._timer = threading.Timer(seconds, self._expire)
        self._timer.daemon = True

    def remaining(self) -> float:
        return max(0.001, self.ends - time.monotonic())

    def watch(self, sock: socket.socket) -> None:
        with self._lock:
            self._sockets.append(sock)
            if self.expired:
                shut(sock)

    def _expire(self) -> None:
        with self._lock:
            self.expired = True
            for sock in self._sockets:
                shut(sock)

    def __enter__(self) -> "Deadline":
        self._timer.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._timer.cancel()


def shut(sock: socket.socket) -> None:
    try:  # the plain socket's shutdown, also for a TLS socket: its SSL object stays with the reading thread
        socket.socket.shutdown(sock, socket.SHUT_RDWR)
    except OSError:
        pass  # already closed
