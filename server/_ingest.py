"""What both ingest RPCs (``Feed`` and ``FeedMany``) share: applying one event to a
session, and telling a caller's cancellation from its half-close.

Generated protobuf types are read here, as in the servicer: this module is part of the edge.
"""

from __future__ import annotations

import asyncio
import sys
from typing import Any

import grpc
from midstream import EventError, Word
from midstream.server._config import ServerLimits
from midstream.server._decode import MalformedMessage
from midstream.server._limits import check_batch_size, check_id, check_word
from midstream.server._session import Session
from midstream.server._status import ProtocolStateError
from midstream.wire import convert as cv
from midstream.wire import midstream_pb2 as pb

# How long an end of the request stream waits to tell a cancellation from a half-close.
_CANCEL_SETTLE_S = 0.05


def apply_event(session: Session, event: pb.ClientEvent | MalformedMessage, received: float,
                limits: ServerLimits) -> bool:
    """Check and apply one event after ``open``; return whether it was ``close``. Never awaits.

    ``received`` is the ``time.monotonic()`` the event was read at (for the latency metric).

    Raises
    ------
    MidstreamError
        The event was refused (its bytes did not decode, a check at the edge, the engine, or
        the protocol state); words
        of a batch before the bad one stay applied and published.
    """
    if isinstance(event, MalformedMessage):
        raise event.error()
    kind = event.WhichOneof("event")
    if kind == "words":
        batch = event.words.words
        check_batch_size(len(batch), limits)
        # One pass (conversion never raises, so checking as it goes refuses the same word).
        words: list[tuple[str, Word]] = []
        for message in batch:
            word_id, word = cv.spoken_word_from_wire(message)
            check_word(word_id, word, limits)
            words.append((word_id, word))
        session.add_words(words, received)
    elif kind == "replace":
        word_id, word = cv.spoken_word_from_wire(event.replace.word)
        check_word(word_id, word, limits)
        session.replace_word(word_id, word, received)
    elif kind == "withdraw":
        check_id(event.withdraw.word_id, "withdraw.word_id", limits)
        session.withdraw_word(event.withdraw.word_id, received)
    elif kind == "hint":
        speaker, turn_end = cv.hint_from_wire(event.hint)
        session.hint(speaker, turn_end=turn_end, received=received)
    elif kind == "tick":
        session.tick(cv.tick_from_wire(event.tick), received=received)
    elif kind == "close":
        return True
    elif kind == "open":
        raise ProtocolStateError(f"'open' may only be the first event (conversation "
                                 f"{session.id} is already open)")
    else:
        raise EventError("the event is empty: set one of words, replace, withdraw, hint, "
                         "tick, close")
    journal = session.journal
    if journal is not None:
        journal.accepted(event.SerializeToString)
    return False


def caller_address(context: grpc.aio.ServicerContext[Any, Any]) -> str:
    """The caller's address without its port (``ipv4:10.0.0.7``), which retention shares by.

    The port is left out because one caller may open many connections.
    """
    peer = context.peer() or ""
    host, colon, port = peer.rpartition(":")
    # Interned: every conversation of one caller then shares one string.
    return sys.intern(host if colon and port.isdigit() else peer)


async def caller_vanished(context: grpc.aio.ServicerContext[Any, Any]) -> bool:
    """Whether an end of the request stream was a cancellation rather than a half-close.

    grpc.aio reports both as ``EOF`` from ``read()``; the cancellation shows on the context (or
    cancels this task) a moment later.
    """
    await asyncio.sleep(_CANCEL_SETTLE_S)
    return context.cancelled() or context.done()
