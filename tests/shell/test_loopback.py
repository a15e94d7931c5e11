"""The one loopback-server helper: binding, a port in use named, stop in any state, a quick restart."""

from __future__ import annotations

import socket
import socketserver
import urllib.request
from http.server import BaseHTTPRequestHandler
from typing import Any

import pytest

from bridge.errors import ConfigError
from bridge.service.loopback import LOOPBACK, LoopbackServer


class Hello(socketserver.BaseRequestHandler):
    """Says one line and closes first (so the server's side of the connection is left in TIME_WAIT)."""

    def handle(self) -> None:
        self.request.sendall(b"hello\n")


class Page(BaseHTTPRequestHandler):
    def do_GET(self) -> None:
        self.send_response(200)
        self.send_header("Content-Length", "3")
        self.end_headers()
        self.wfile.write(b"ok\n")

    def log_message(self, format: str, *args: Any) -> None:
        """Quiet."""


def _read(port: int) -> bytes:
    with socket.create_connection((LOOPBACK, port), timeout=2) as client:
        return client.makefile("rb").readline()


def test_it_binds_a_free_loopback_port_and_answers_tcp_and_http() -> None:
    """Port 0 gives a free port on 127.0.0.1; a stream handler and an HTTP handler both answer."""
    with LoopbackServer(Hello) as tcp, LoopbackServer(Page) as http:
        line = _read(tcp.port)
        with urllib.request.urlopen(f"http://{LOOPBACK}:{http.port}/", timeout=2) as answer:
            page = (answer.status, answer.read())

    assert (LOOPBACK, LOOPBACK, b"hello\n", (200, b"ok\n")) == (tcp.host, tcp.server.server_address[0], line, page)
    assert 0 not in (tcp.port, http.port)


def test_a_port_in_use_is_one_config_error_naming_the_setting_and_the_port() -> None:
    """A second listener on a port in use: the setting that chose the port, the port, the reason."""
    with LoopbackServer(Hello) as first, pytest.raises(ConfigError) as caught:
        LoopbackServer(Hello, first.port, setting="metrics_port")

    # common practice: Linux says EADDRINUSE as "Address already in use"
    assert f"metrics_port: a free port on 127.0.0.1 (port {first.port}: Address already in use)" == str(caught.value)


def test_stop_is_safe_before_start_and_twice_and_frees_the_port() -> None:
    """Never started, stopped twice: no hang; the port is free again (a new listener binds it)."""
    never = LoopbackServer(Hello)
    never.stop()
    never.stop()
    again = LoopbackServer(Hello, never.port)
    again.start()
    line = _read(again.port)
    again.stop()
    again.stop()

    assert b"hello\n" == line


def test_a_restart_on_the_same_port_does_not_wait_for_old_connections() -> None:
    """After connections the server closed first (TIME_WAIT on its side), the same port binds at once.

    Without SO_REUSEADDR the kernel refuses that bind for a minute or more.
    source: POSIX setsockopt SO_REUSEADDR; RFC 9293 §3.6 (TIME-WAIT after the active close)
    """
    first = LoopbackServer(Hello)
    first.start()
    lines = [_read(first.port) for _ in range(3)]
    first.stop()

    with LoopbackServer(Hello, first.port) as second:
        lines.append(_read(second.port))

    assert [b"hello\n"] * 4 == lines


def test_an_ipv6_loopback_address_is_bound_as_ipv6() -> None:
    """metrics_host may be ::1 (config allows it): the listener is an IPv6 one."""
    try:
        with socket.socket(socket.AF_INET6) as probe:
            probe.bind(("::1", 0))
    except OSError:
        pytest.skip("this machine has no IPv6 loopback")
    with LoopbackServer(Page, host="::1") as server, urllib.request.urlopen(f"http://[::1]:{server.port}/") as answer:
        status = answer.status

    assert (socket.AF_INET6, 200) == (server.server.address_family, status)
