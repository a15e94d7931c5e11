"""A server on a loopback address, answering in a background thread (shell).

Owns the lifecycle every listener of the project shares (the ``/healthz`` and ``/metrics``
endpoint, the stand-in's MLLP and FHIR peers, the tests' peers): binding to 127.0.0.1 (or the
loopback address given) on the port given, 0 for a free one; address reuse, so a restart does not
wait out the old connections; one thread per connection; start, stop (safe before start and
twice) and the port bound. A port that cannot be bound is a :class:`~bridge.errors.ConfigError`
naming the setting that chose it and the port. What is answered is the handler's business.
"""

from __future__ import annotations

import socket
import socketserver
import threading
from types import TracebackType
from typing import Self

from bridge.errors import ConfigError

LOOPBACK = "127.0.0.1"


class _Server(socketserver.ThreadingTCPServer):
    allow_reuse_address = True
    daemon_threads = True  # a connection left open never holds up a stop


class _Server6(_Server):
    address_family = socket.AF_INET6


class LoopbackServer:
    """``handler`` answering each connection on ``host:port``, in a daemon thread once started.

    ``setting`` is what a user changes to pick another port (``metrics_port``, ``--mllp-port``).
    """

    def __init__(
        self,
        handler: type[socketserver.BaseRequestHandler],
        port: int = 0,
        *,
        host: str = LOOPBACK,
        setting: str = "port",
        name: str = "loopback",
    ) -> None:
        self.host = host
        server = _Server6 if ":" in host else _Server
        try:
            self.server = server((host, port), handler)
        except OSError as exc:
            raise ConfigError(setting, f"a free port on {host} (port {port}: {exc.strerror or exc})") from exc
        self._thread = threading.Thread(target=self.server.serve_forever, args=(0.1,), name=name, daemon=True)

    @property
    def port(self) -> int:
        return int(self.server.server_address[1])

    def start(self) -> None:
        self._thread.start()

    def stop(self) -> None:
        """Stop answering and close the port; connections still open end with the process."""
        if self._thread.is_alive():
            self.server.shutdown()  # waits for serve_forever to return: only once it runs
            self._thread.join(timeout=5)
        self.server.server_close()

    def __enter__(self) -> Self:
        self.start()
        return self

    def __exit__(self, kind: type[BaseException] | None, error: BaseException | None, tb: TracebackType | None) -> None:
        self.stop()
