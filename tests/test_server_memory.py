"""The server tunes the C allocator (arenas, mmap threshold) before its threads start.

Reference: the glibc manual (mallopt returns 1 on success, 0 on error; M_ARENA_MAX is -8 and
M_MMAP_THRESHOLD -3 in malloc.h) and ``platform.libc_ver`` for which C library runs the tests.
"""
from __future__ import annotations

import platform

from app import server


def test_allocator_settings_are_taken_by_glibc_and_harmless_elsewhere():
    took = server.tune_allocator()
    if platform.system() == "Linux" and platform.libc_ver()[0] == "glibc":
        assert took is True
    else:
        assert took is False
    assert (server.M_ARENA_MAX, server.M_MMAP_THRESHOLD) == (-8, -3)     # glibc malloc.h


def test_run_server_tunes_the_allocator_before_starting(monkeypatch):
    order = []
    monkeypatch.setattr(server, "tune_allocator", lambda *a: order.append("cap") or True)
    monkeypatch.setattr(server, "_warm_up", lambda ctx: order.append("warm-up"))
    monkeypatch.setattr(server.dash.Dash, "run", lambda self, **kw: order.append("run"))
    server.run_server()
    assert order == ["cap", "warm-up", "run"]
