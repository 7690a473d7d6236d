"""The server caps the C allocator's arenas before its threads start.

Reference: the glibc manual (mallopt returns 1 on success, 0 on error; M_ARENA_MAX is -8 in
malloc.h) and ``platform.libc_ver`` for which C library runs the tests.
"""
from __future__ import annotations

import platform

from app import server


def test_arena_cap_is_taken_by_glibc_and_harmless_elsewhere():
    took = server.limit_allocator_arenas(2)
    if platform.system() == "Linux" and platform.libc_ver()[0] == "glibc":
        assert took is True
    else:
        assert took is False
    assert server.M_ARENA_MAX == -8     # glibc malloc.h


def test_run_server_sets_the_cap_before_starting(monkeypatch):
    order = []
    monkeypatch.setattr(server, "limit_allocator_arenas", lambda *a: order.append("cap") or True)
    monkeypatch.setattr(server, "_warm_up", lambda ctx: order.append("warm-up"))
    monkeypatch.setattr(server.dash.Dash, "run", lambda self, **kw: order.append("run"))
    server.run_server()
    assert order == ["cap", "warm-up", "run"]
