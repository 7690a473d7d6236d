"""`cohortlens` without a command serves; --port, --verbose and --open reach the server; the
request log is quiet unless asked. No server is started and no browser is opened here."""
from __future__ import annotations

import logging

import pytest

import app.server as server
from app import cli


@pytest.fixture()
def served(monkeypatch):
    calls = []
    monkeypatch.setattr(server, "run_server", lambda **kw: calls.append(kw))
    return calls


def test_port_without_serve_starts_the_dashboard_quietly(served):
    assert cli.main(["--port", "8123"]) == 0
    assert served[0]["port"] == 8123
    assert served[0]["verbose"] is False and served[0]["open_browser"] is False


def test_verbose_and_open_reach_the_server(served):
    assert cli.main(["serve", "--port", "8124", "--verbose", "--open"]) == 0
    assert served[0]["verbose"] is True and served[0]["open_browser"] is True


def test_request_log_is_quiet_unless_verbose():
    werkzeug = logging.getLogger("werkzeug")
    before = werkzeug.level
    try:
        server.request_logging(False)
        assert not werkzeug.isEnabledFor(logging.INFO)       # no line per request
        assert werkzeug.isEnabledFor(logging.WARNING)
        server.request_logging(True)
        assert werkzeug.isEnabledFor(logging.INFO)
    finally:
        werkzeug.setLevel(before)


def test_open_waits_for_the_server_then_opens_the_url(monkeypatch):
    import webbrowser

    opened = []
    monkeypatch.setattr(webbrowser, "open", lambda url: opened.append(url))
    server.open_browser_later("http://127.0.0.1:8125/", delay=0.01).join(timeout=5)
    assert opened == ["http://127.0.0.1:8125/"]
