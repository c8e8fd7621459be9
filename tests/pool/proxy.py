"""A TCP proxy on loopback that a test can cut: one worker's own path to the broker.

``cut()`` closes every proxied connection (both ends see the connection end, as after a network fault
that resets it) and stops listening, so reconnection attempts are refused; ``restore()`` listens again
on the same port. Everything else (the broker, the other workers, PostgreSQL) is untouched.
"""

from __future__ import annotations

import contextlib
import socket
import threading

from tests.servers import free_loopback_port

CHUNK_BYTES = 65536


class CuttableProxy:
    """Forwards ``127.0.0.1:port`` to ``127.0.0.1:upstream_port`` until cut."""

    def __init__(self, upstream_port: int) -> None:
        self.upstream_port = upstream_port
        self.port = free_loopback_port()
        self.accepted = 0  # connections accepted since the start (over cuts)
        self._lock = threading.Lock()
        self._sockets: set[socket.socket] = set()
        self._listener: socket.socket | None = None

    def start(self) -> CuttableProxy:
        listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        listener.bind(("127.0.0.1", self.port))
        listener.listen(64)
        self._listener = listener
        threading.Thread(target=self._accept, args=(listener,), name="proxy-accept", daemon=True).start()
        return self

    def _accept(self, listener: socket.socket) -> None:
        while True:
            try:
                downstream, _ = listener.accept()
            except OSError:
                return  # cut or closed
            if self._listener is not listener:  # accepted while being cut
                downstream.close()
                return
            try:
                upstream = socket.create_connection(("127.0.0.1", self.upstream_port), timeout=5)
            except OSError:
                downstream.close()
                continue
            upstream.settimeout(None)
            with self._lock:
                self._sockets.update((downstream, upstream))
                self.accepted += 1
            for a, b in ((downstream, upstream), (upstream, downstream)):
                threading.Thread(target=self._pump, args=(a, b), name="proxy-pump", daemon=True).start()

    def _pump(self, source: socket.socket, sink: socket.socket) -> None:
        try:
            while data := source.recv(CHUNK_BYTES):
                sink.sendall(data)
        except OSError:
            pass
        finally:
            self._close(source, sink)

    def _close(self, *sockets: socket.socket) -> None:
        for s in sockets:
            with self._lock:
                self._sockets.discard(s)
            with contextlib.suppress(OSError):
                s.shutdown(socket.SHUT_RDWR)
            s.close()

    def cut(self) -> None:
        """Close every connection and stop listening (new connections are refused)."""
        listener, self._listener = self._listener, None
        if listener is not None:
            # close() alone does not end an accept() blocked in another thread, and that accept would go on
            # taking connections; shutdown() makes it fail at once (Linux)
            with contextlib.suppress(OSError):
                listener.shutdown(socket.SHUT_RDWR)
            listener.close()
        with self._lock:
            open_sockets = list(self._sockets)
        self._close(*open_sockets)

    def restore(self) -> None:
        """Listen again on the same port."""
        if self._listener is None:
            self.start()

    def close(self) -> None:
        self.cut()
