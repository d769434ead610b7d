"""How the streaming commands print what the server says (only command modules call this).

:class:`Printer` chooses one of three renderings: JSON Lines of every event (``--json``), a
live terminal view that redraws open utterances within the terminal's width (stdout a TTY), or
one line per finished utterance in the order the utterances were spoken (anything else, e.g. a
log file). ``--clean`` prints clean text instead of marked
words; ``--rates`` ends with per-speaker disfluency rates and their caution.
"""

from __future__ import annotations

import asyncio
import contextlib
import shutil
import threading
from collections.abc import AsyncIterator, Iterator
from typing import TextIO

from midstream.client._inputs import TimedEvent
from midstream.client._results import Ended, Gap, Reconnected, ServerEvent, Snapshot
from midstream.client.cli._records import SentWord, dumps, event_record
from midstream.client.cli._view import (
    RATES_CAUTION,
    Board,
    SpokenOrder,
    TerminalView,
    disfluency_rates,
    rates_table,
    utterance_line,
)


class Printer:
    """Render server events to ``out`` in the chosen mode; also keeps the :class:`Board`."""

    def __init__(self, out: TextIO, *, json_lines: bool, live: bool, clean: bool,
                 rates: bool, quiet: bool = False) -> None:
        self.out = out
        self.board = Board()
        self._json = json_lines
        self._clean = clean
        self._rates = rates
        self._quiet = quiet
        self._view = TerminalView(out, self.board, clean=clean, width=_terminal_width,
                                  height=_terminal_height) if live and not json_lines else None
        self._order = SpokenOrder(self.board)

    def word(self, word: SentWord) -> None:
        self.board.note_text(word.word_id, word.text)

    def event(self, event: ServerEvent, sent: int | None = None) -> None:
        changed, _ = self.board.apply(event)
        if self._json:
            print(dumps(event_record(event)), file=self.out, flush=True)
            return
        if isinstance(event, Gap):
            self._note(f"[gap: updates from {event.first_missing} are lost "
                       f"({event.reason.value}); a snapshot follows]")
        elif isinstance(event, Reconnected):
            where = (f"from seq {event.from_seq}" if event.from_seq is not None
                     else "from a snapshot")
            self._note(f"[connection lost: reconnecting {where}, attempt {event.attempt}]")
        elif isinstance(event, Snapshot):
            self._note(f"[snapshot as of seq {event.seq}]")
        if self._quiet:
            return
        ended = isinstance(event, Ended)
        if self._view is not None:
            self._view.refresh(changed, ended=ended)
        else:
            self._order.note(changed)
            for utterance in self._order.release(force=ended or self.board.final):
                print(utterance_line(self.board, utterance, clean=self._clean),
                      file=self.out, flush=True)
        if isinstance(event, Ended):
            self._note(f"[conversation ended: {event.reason.value}, last seq {event.last_seq}]")

    def _note(self, text: str) -> None:
        if not self._json:
            print(text, file=self.out, flush=True)

    def finish(self) -> None:
        """Print what is left (utterances, rates) once the conversation has ended."""
        if self._view is None and not self._json and not self._quiet:
            # A stream that stopped without an end notice still shows every finished utterance.
            for utterance in self._order.release(force=True):
                print(utterance_line(self.board, utterance, clean=self._clean),
                      file=self.out, flush=True)
        if self._rates:
            words = [w for w in self.board.words.values() if w.word_id not in self.board.withdrawn]
            text = rates_table(disfluency_rates(words))
            if self._json:
                # Keep stdout pure JSON Lines: the rates go there as one record, caution included.
                rows = [{"speaker": r.speaker, "words": r.words,
                         "per_100": {label.value: round(r.per_100(label), 3) for label in r.counts},
                         "disfluent_per_100": round(r.disfluent_per_100, 3)}
                        for r in disfluency_rates(words)]
                print(dumps({"type": "rates", "speakers": rows, "caution": RATES_CAUTION}),
                      file=self.out, flush=True)
            else:
                print(text, file=self.out, flush=True)


def _terminal_width() -> int:
    """Columns of the terminal now (asked on every redraw, so a resized window is followed)."""
    return shutil.get_terminal_size().columns


def _terminal_height() -> int:
    """Rows of the terminal now."""
    return shutil.get_terminal_size().lines


async def lines_from_thread(iterator: Iterator[TimedEvent], *, bound: int = 256
                            ) -> AsyncIterator[TimedEvent]:
    """Run a blocking event iterator (a pipe) in a daemon thread and yield its events.

    The queue holds at most ``bound`` events: the reading thread blocks when the server is
    slower than the pipe. A daemon thread never keeps the process alive on a stuck pipe.
    Errors from the iterator (a bad line) are re-raised here.
    """
    loop = asyncio.get_running_loop()
    queue: asyncio.Queue[tuple[str, object]] = asyncio.Queue(maxsize=bound)

    def pump() -> None:
        try:
            for item in iterator:
                asyncio.run_coroutine_threadsafe(queue.put(("event", item)), loop).result()
            asyncio.run_coroutine_threadsafe(queue.put(("end", None)), loop).result()
        except BaseException as exc:  # handed over to the event loop, which re-raises it
            # RuntimeError: the loop is gone (the command ended first); nothing is left to tell.
            with contextlib.suppress(RuntimeError):
                asyncio.run_coroutine_threadsafe(queue.put(("error", exc)), loop).result()

    threading.Thread(target=pump, name="midstream-input", daemon=True).start()
    while True:
        kind, value = await queue.get()
        if kind == "end":
            return
        if kind == "error":
            assert isinstance(value, BaseException)
            raise value
        assert isinstance(value, TimedEvent)
        yield value
