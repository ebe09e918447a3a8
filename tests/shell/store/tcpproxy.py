"""A TCP forwarder on 127.0.0.1 that a test can cut and restore: the network between sigmatrack
and its PostgreSQL server going away for a stretch, for real (the server itself is never
touched)."""

from __future__ import annotations

import contextlib
import socket
import threading


def free_port() -> int:
    """A loopback port nothing listens on (bound, then closed)."""
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


class TcpProxy:
    """Forwards connections from ``127.0.0.1:port`` to ``target``.

    :meth:`cut` closes the listening socket and every forwarded connection, so clients see
    their connections reset and new ones refused; :meth:`restore` listens again on the same
    port. Every thread ends when its sockets close; :meth:`cut` joins them (bounded).
    """

    def __init__(self, target: tuple[str, int], port: int | None = None) -> None:
        self.target = target
        self.port = free_port() if port is None else port
        self._listener: socket.socket | None = None
        self._sockets: list[socket.socket] = []
        self._threads: list[threading.Thread] = []
        self._lock = threading.Lock()

    def restore(self) -> TcpProxy:
        """Listen (again); nothing happens if it already listens."""
        if self._listener is not None:
            return self
        listener = socket.socket()
        try:
            listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
            listener.bind(("127.0.0.1", self.port))
            listener.listen(16)
        except OSError:
            listener.close()
            raise
        self._listener = listener
        self._spawn(self._accept, listener)
        return self

    start = restore

    def cut(self) -> None:
        listener, self._listener = self._listener, None
        if listener is not None:
            with contextlib.suppress(OSError):
                listener.shutdown(socket.SHUT_RDWR)
            listener.close()
        with self._lock:
            sockets, self._sockets = self._sockets, []
            threads, self._threads = self._threads, []
        for sock in sockets:
            with contextlib.suppress(OSError):
                sock.shutdown(socket.SHUT_RDWR)
            sock.close()
        for thread in threads:
            thread.join(5.0)
            assert not thread.is_alive(), "a proxy thread did not stop"

    close = cut

    def _spawn(self, target, *args) -> None:
        thread = threading.Thread(target=target, args=args, daemon=True)
        with self._lock:
            self._threads.append(thread)
            thread.start()

    def _accept(self, listener: socket.socket) -> None:
        while True:
            try:
                client, _ = listener.accept()
            except OSError:
                return  # the listener was closed: cut
            try:
                upstream = socket.create_connection(self.target, timeout=5.0)
            except OSError:
                client.close()
                continue
            upstream.settimeout(None)
            with self._lock:
                if self._listener is not listener:  # cut meanwhile
                    client.close()
                    upstream.close()
                    return
                self._sockets += [client, upstream]
                pumps = [
                    threading.Thread(target=self._pump, args=pair, daemon=True)
                    for pair in ((client, upstream), (upstream, client))
                ]
                self._threads += pumps
                for pump in pumps:
                    pump.start()

    @staticmethod
    def _pump(source: socket.socket, sink: socket.socket) -> None:
        while True:
            try:
                data = source.recv(65536)
                if not data:
                    break
                sink.sendall(data)
            except OSError:
                break
        with contextlib.suppress(OSError):
            sink.shutdown(socket.SHUT_WR)
