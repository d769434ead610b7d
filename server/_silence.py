"""The server's own clock for a conversation whose caller asked for it (``open.server_ticks``).

Live, a silence is the absence of words: a voice agent must learn that an utterance ended
without waiting for the next word. A caller that cannot send time ticks of its own asks the
server to send them: while no word arrives, the conversation's time moves on by the server's
monotonic clock, mapped onto the clock of the words' times as

    stream time = the latest word end heard + the seconds since the latest timed word arrived

(a recogniser sends a word after it ended, so this silence is never longer than the real one).
The server ticks only as the silence passes one of the engine's *silence marks* (the silences
at which the boundary model's evidence can change; between two marks a tick would decide
what the one before decided) from ``ServerLimits.server_tick_min_silence_s`` on: at most one
tick per mark per silence, none after the last mark, and none at all on a conversation without
timed words or without a boundary model.

Bounded: one timer per conversation at most (a :class:`SilenceClock` holds one handle, re-armed
only when it fires, so a word costs three stores and no timer call), cancelled when the
conversation ends. A tick runs as one loop callback, like an event's step: it never awaits.
"""

from __future__ import annotations

import asyncio
import logging
import math
import time
from collections.abc import Callable
from typing import TYPE_CHECKING

if TYPE_CHECKING:  # the session imports this module
    from midstream.server._session import Session

__all__ = ["SilenceClock"]

_log = logging.getLogger(__name__)


class SilenceClock:
    """Ticks one session's time on while no word arrives; see the module docstring.

    ``marks`` are the silences (seconds, ascending) to tick at; ``wake`` is called after a tick
    published an update, so the stream sends it without waiting for the caller. Use from the
    event loop thread only.
    """

    __slots__ = ("_at", "_due", "_end", "_handle", "_loop", "_marks", "_next", "_session",
                 "_wake")

    def __init__(self, session: Session, marks: tuple[float, ...],
                 wake: Callable[[], None]) -> None:
        self._session = session
        self._marks = marks
        self._wake = wake
        self._loop = asyncio.get_running_loop()
        self._end = -math.inf  # the latest word end heard (stream seconds)
        self._at = 0.0  # time.monotonic() when the latest timed word arrived
        self._next = 0  # the mark of the current silence to tick at next
        self._handle: asyncio.TimerHandle | None = None
        self._due = 0.0  # time.monotonic() the handle fires at

    @property
    def armed(self) -> bool:
        """Whether a tick is scheduled."""
        return self._handle is not None

    def heard(self, end: float, received: float) -> None:
        """A word that ended at ``end`` (stream seconds) arrived at ``received``
        (``time.monotonic()``): a new silence starts after it."""
        self._end = max(self._end, end)
        self._at = received
        self._next = 0
        marks = self._marks
        if not marks:
            return
        first = received + marks[0]
        # Usually a handle is already due sooner (it re-arms itself when early): re-arming is
        # only needed when it was set late in a long silence, or not at all.
        if self._handle is None or self._due > first:
            self._arm(first)

    def cancel(self) -> None:
        """Drop the timer (the conversation ended); idempotent."""
        if self._handle is not None:
            self._handle.cancel()
            self._handle = None

    def _arm(self, due: float) -> None:
        if self._handle is not None:
            self._handle.cancel()
        self._due = due
        self._handle = self._loop.call_at(
            self._loop.time() + max(due - time.monotonic(), 0.0), self._fire)

    def _fire(self) -> None:
        self._handle = None
        session = self._session
        if not session.live:
            return
        now = time.monotonic()
        silent = now - self._at
        marks, k = self._marks, self._next
        if k < len(marks) and silent >= marks[k]:
            # One tick weighs the whole silence so far, however many marks it passed.
            while k < len(marks) and silent >= marks[k]:
                k += 1
            self._next = k
            try:
                update = session.tick(self._end + silent, received=now)
            except Exception as exc:  # a loop callback: nobody above would see it
                # Only the type: an engine's message may quote words. The stream goes on,
                # without the server's clock.
                _log.error("server tick of conversation %s failed (%s); its clock stopped",
                           session.id, type(exc).__name__)
                _log.debug("server tick failure detail", exc_info=True)
                return
            if update is not None:
                self._wake()
        if k < len(marks):
            self._arm(self._at + marks[k])
