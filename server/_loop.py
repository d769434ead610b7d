"""Which event loop the server runs on.

The service spends most of its CPU moving one small message in and one out per word. uvloop's
loop did the same work with about a fifth less CPU than the standard loop in a one-off
measurement while this was written (a bare gRPC echo stream, 200 streams x 3 messages/s, server
on one core: 245 vs 303 us of server CPU per message; that script was not kept, so treat the
figure as indicative), so the server runs on it where it is installed (not on Windows, where
the standard loop remains).
"""

from __future__ import annotations

import asyncio
from collections.abc import Callable, Coroutine
from typing import Any, TypeVar

_T = TypeVar("_T")


def loop_factory() -> Callable[[], asyncio.AbstractEventLoop] | None:
    """uvloop's loop factory when uvloop is importable, else ``None`` (the standard loop)."""
    try:
        import uvloop  # noqa: PLC0415 - optional: absent on Windows
    except ImportError:
        return None
    factory: Callable[[], asyncio.AbstractEventLoop] = uvloop.new_event_loop
    return factory


def run_server_loop(main: Coroutine[Any, Any, _T]) -> _T:
    """Run ``main`` to completion on the loop :func:`loop_factory` picks (entry points only)."""
    with asyncio.Runner(loop_factory=loop_factory()) as runner:
        return runner.run(main)
