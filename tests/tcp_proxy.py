"""A loopback TCP relay that a test can cut and restore: the service's view of a database that becomes
unreachable (connections dropped, new ones refused) without stopping the PostgreSQL server other tests use."""

from __future__ import annotations

import socket
import threading


class CuttableProxy:
    def __init__(self, target_host: str, target_port: int) -> None:
        self.target = (target_host, target_port)
        self._open = True
        self._sockets: list[socket.socket] = []
        self._lock = threading.Lock()
        self._listener = socket.create_server(("127.0.0.1", 0))
        self.port = self._listener.getsockname()[1]
        threading.Thread(target=self._accept, daemon=True).start()

    def _accept(self) -> None:
        while True:
            try:
                client, _ = self._listener.accept()
            except OSError:
                return
            if not self._open:
                client.close()           # refused, as a server that is down
                continue
            try:
                upstream = socket.create_connection(self.target, timeout=5)
            except OSError:
                client.close()
                continue
            with self._lock:
                self._sockets += [client, upstream]
            for source, sink in ((client, upstream), (upstream, client)):
                threading.Thread(target=self._pipe, args=(source, sink), daemon=True).start()

    @staticmethod
    def _pipe(source: socket.socket, sink: socket.socket) -> None:
        try:
            while data := source.recv(65536):
                sink.sendall(data)
        except OSError:
            pass
        finally:
            for end in (source, sink):
                try:
                    end.shutdown(socket.SHUT_RDWR)
                except OSError:
                    pass

    def cut(self) -> None:
        """Drop every open connection and refuse new ones."""
        self._open = False
        with self._lock:
            sockets, self._sockets = self._sockets, []
        for end in sockets:
            try:
                end.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass
            end.close()

    def restore(self) -> None:
        self._open = True

    def close(self) -> None:
        self.cut()
        self._listener.close()
