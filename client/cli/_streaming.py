"""Stream input events to a server and hand every reply to the caller's sinks.

Shared by ``midstream tag``, ``midstream replay`` and ``midstream demo``: one task sends
(paced to the input's times at a real-time factor, or as fast as the server accepts), the
calling task reads the replies. Sending waits on gRPC flow control, so a slow server slows the
sender rather than filling memory.
"""

from __future__ import annotations

import asyncio
import time
from collections.abc import AsyncIterable, AsyncIterator, Callable, Iterable
from dataclasses import dataclass

from midstream import AddWord, HypothesisUpdate
from midstream.client._client import Client
from midstream.client._inputs import TimedEvent
from midstream.client._results import Ended, ServerEvent, Welcome
from midstream.client.cli._records import GoldWord, SentWord


@dataclass(frozen=True, slots=True, kw_only=True)
class Pacing:
    """How fast to send: ``speed`` is the real-time factor (1.0 real time, 0 no waiting).

    Events without a time are spaced ``1 / words_per_second`` seconds of input time after the
    previous event when ``speed > 0``. 2.5 words a second is about conversational speaking rate
    (from memory: 150 words a minute).
    """

    speed: float = 0.0
    words_per_second: float = 2.5


async def _timeline(events: Iterable[TimedEvent] | AsyncIterable[TimedEvent]
                    ) -> AsyncIterator[TimedEvent]:
    if isinstance(events, AsyncIterable):
        async for event in events:
            yield event
    else:
        for event in events:
            yield event


@dataclass(slots=True)
class StreamResult:
    """What a streamed conversation produced."""

    conversation_id: str
    updates: int = 0
    words_sent: int = 0
    ended: Ended | None = None


OnWord = Callable[[SentWord], None]
OnEvent = Callable[[ServerEvent, int], None]


async def stream_conversation(
    client: Client,
    events: Iterable[TimedEvent] | AsyncIterable[TimedEvent],
    *,
    pacing: Pacing | None = None,
    gold: dict[str, GoldWord] | None = None,
    conversation_id: str | None = None,
    on_welcome: Callable[[Welcome], None] = lambda welcome: None,
    on_word: OnWord = lambda word: None,
    on_event: OnEvent = lambda event, sent: None,
    server_ticks: bool = False,
) -> StreamResult:
    """Send ``events`` as one conversation and pass every reply to ``on_event``.

    ``on_word`` sees each word as it is sent (with its gold annotation when ``gold`` has it);
    ``on_event`` sees each server event with the number of words sent when it arrived.
    ``server_ticks`` opens the conversation with the server's clock ticking through silences
    (:meth:`Client.feed`). Returns once the server has ended the conversation.
    """
    pacing = pacing or Pacing()
    counter = [0]
    async with client.feed(conversation_id, server_ticks=server_ticks) as stream:
        result = StreamResult(conversation_id=stream.conversation_id)
        on_welcome(stream.welcome)

        async def send() -> None:
            wall_start = time.monotonic()
            first: float | None = None
            clock = 0.0
            async for timed in _timeline(events):
                if pacing.speed > 0:
                    if timed.time is not None:
                        clock = timed.time
                    elif isinstance(timed.event, AddWord):
                        clock += 1.0 / pacing.words_per_second
                    first = clock if first is None else first
                    delay = wall_start + (clock - first) / pacing.speed - time.monotonic()
                    if delay > 0:
                        await asyncio.sleep(delay)
                event = timed.event
                if isinstance(event, AddWord):
                    counter[0] += 1
                    on_word(SentWord(word_id=event.word_id, speaker=event.word.speaker,
                                     text=event.word.text, start=event.word.start,
                                     end=event.word.end, sent=counter[0],
                                     gold=(gold or {}).get(event.word_id)))
                await stream.send(event)
            await stream.close()

        async def read() -> None:
            async for event in stream:
                if isinstance(event, Welcome):
                    continue
                if isinstance(event, HypothesisUpdate):
                    result.updates += 1
                on_event(event, counter[0])
                if isinstance(event, Ended):
                    result.ended = event

        sender = asyncio.create_task(send())
        reader = asyncio.create_task(read())
        try:
            # Whichever fails first decides the error: a bad input line stops the reader too,
            # and a refused event (the server's error on the stream) stops the sender.
            done, _ = await asyncio.wait({sender, reader},
                                         return_when=asyncio.FIRST_EXCEPTION)
            for task in (sender, reader):
                if task in done and task.exception() is not None:
                    raise task.exception()  # type: ignore[misc]
            await reader
            if not sender.done():
                # The server ended the conversation on its own (idle timeout, shutdown).
                sender.cancel()
        finally:
            for task in (sender, reader):
                if not task.done():
                    task.cancel()
            await asyncio.gather(sender, reader, return_exceptions=True)
    result.words_sent = counter[0]
    return result
