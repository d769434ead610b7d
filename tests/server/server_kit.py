"""Server test kit: fixtures, event builders and a small deterministic engine.

It follows the engine contract (``midstream.server._models.Engine``) with trivial rules so a
test can predict every update: "uh"/"um" are fillers, an immediately repeated word turns the
first copy into a reparandum (a revision) and the second into the repair onset, a word becomes
final three words later or at a hint, and an utterance is a speaker's words between hints.
Tagging quality is tested against the real models elsewhere; this double only lets the server
tests run before and independently of trained models.

Test modules import the fixtures they use (``from server_kit import running_fixture``): a
second ``conftest.py`` would clash with ``tests/conftest.py`` under mypy.
"""

from __future__ import annotations

from collections.abc import AsyncIterator, Awaitable, Callable
from dataclasses import dataclass, field, replace
from typing import Any

import grpc
import pytest
from midstream import (
    REMOVED_FROM_CLEAN_TEXT,
    DisfluencyLabel,
    EventError,
    HypothesisDiff,
    UtteranceFunction,
    UtteranceHypothesis,
    Word,
    WordHypothesis,
)
from midstream.server import MidstreamServer, ServerConfig, ServerLimits
from midstream.wire import midstream_pb2 as pb
from midstream.wire import midstream_pb2_grpc as pb_grpc

_FILLERS = frozenset({"uh", "um"})
_QUESTION_STARTS = frozenset({"what", "do", "is", "how", "why"})
_FINAL_AFTER = 3


@dataclass
class _Utterance:
    utterance_id: str
    word_ids: list[str] = field(default_factory=list)
    revision: int = -1


@dataclass(frozen=True, slots=True, kw_only=True)
class FakeModelInfo:
    kind: str
    name: str
    format_version: int = 1
    labels: tuple[str, ...] = ()
    sha256: str = "0" * 64
    training_summary: dict[str, object] = field(default_factory=dict)


class FakeEngine:
    def __init__(self) -> None:
        self._states: dict[str, WordHypothesis] = {}
        self._text: dict[str, str] = {}
        self._open: dict[str, list[str]] = {}
        self._utterances: dict[str, _Utterance] = {}
        self._count = 0
        self._finished = False

    @staticmethod
    def _normalise(word_id: str, text: str) -> str:
        clean = "".join(c for c in text.lower() if c.isalnum() or c in "'-")
        if not clean:
            raise EventError(f"word {word_id!r} has no speech content")
        return clean

    def _check_open(self) -> None:
        if self._finished:
            raise EventError("the conversation has finished")

    def _known_open(self, word_id: str) -> WordHypothesis:
        state = self._states.get(word_id)
        if state is None:
            raise EventError(f"unknown word id {word_id!r}")
        if state.final:
            raise EventError(f"word {word_id!r} is final")
        return state

    def _utterance_state(self, speaker: str, *, final: bool) -> UtteranceHypothesis:
        utt = self._utterances[speaker]
        utt.revision += 1
        kept = [self._text[w] for w in utt.word_ids
                if self._states[w].label not in REMOVED_FROM_CLEAN_TEXT]
        question = bool(kept) and kept[0] in _QUESTION_STARTS
        return UtteranceHypothesis(
            utterance_id=utt.utterance_id, speaker=speaker, word_ids=tuple(utt.word_ids),
            clean_text=" ".join(kept),
            function=UtteranceFunction.QUESTION if question else UtteranceFunction.STATEMENT,
            fine_class="qy" if question else "sd", confidence=0.8, revision=utt.revision,
            final=final,
        )

    def add_word(self, word_id: str, word: Word) -> HypothesisDiff:
        self._check_open()
        if word_id in self._states:
            raise EventError(f"duplicate word id {word_id!r}")
        text = self._normalise(word_id, word.text)
        changed: dict[str, WordHypothesis] = {}
        opened = self._open.setdefault(word.speaker, [])
        label = DisfluencyLabel.FILLER if text in _FILLERS else DisfluencyLabel.FLUENT
        if opened and self._text[opened[-1]] == text:
            previous = self._states[opened[-1]]
            changed[previous.word_id] = self._states[previous.word_id] = replace(
                previous, label=DisfluencyLabel.REPARANDUM, reparandum_of=word_id,
                interruption_point=True, revision=previous.revision + 1)
            label = DisfluencyLabel.REPAIR
        self._text[word_id] = text
        changed[word_id] = self._states[word_id] = WordHypothesis(
            word_id=word_id, speaker=word.speaker, label=label, confidence=0.9, revision=0,
            final=False)
        opened.append(word_id)
        while len(opened) > _FINAL_AFTER:
            old = opened.pop(0)
            changed[old] = self._states[old] = replace(self._states[old], final=True)
        if word.speaker not in self._utterances:
            self._count += 1
            self._utterances[word.speaker] = _Utterance(f"u{self._count}")
        self._utterances[word.speaker].word_ids.append(word_id)
        return HypothesisDiff(words=tuple(changed.values()),
                              utterances=(self._utterance_state(word.speaker, final=False),))

    def replace_word(self, word_id: str, word: Word) -> HypothesisDiff:
        self._check_open()
        state = self._known_open(word_id)
        text = self._normalise(word_id, word.text)
        self._text[word_id] = text
        label = DisfluencyLabel.FILLER if text in _FILLERS else DisfluencyLabel.FLUENT
        self._states[word_id] = replace(state, label=label, revision=state.revision + 1)
        return HypothesisDiff(words=(self._states[word_id],),
                              utterances=(self._utterance_state(state.speaker, final=False),))

    def withdraw_word(self, word_id: str) -> HypothesisDiff:
        self._check_open()
        state = self._known_open(word_id)
        self._open[state.speaker].remove(word_id)
        self._utterances[state.speaker].word_ids.remove(word_id)
        del self._states[word_id]
        return HypothesisDiff(withdrawn_word_ids=(word_id,),
                              utterances=(self._utterance_state(state.speaker, final=False),))

    def _close_speaker(self, speaker: str) -> HypothesisDiff:
        words = []
        for word_id in self._open.pop(speaker, []):
            words.append(replace(self._states[word_id], final=True))
            self._states[word_id] = words[-1]
        if speaker not in self._utterances:
            return HypothesisDiff(words=tuple(words))
        utterance = self._utterance_state(speaker, final=True)
        del self._utterances[speaker]
        return HypothesisDiff(words=tuple(words), utterances=(utterance,))

    def hint(self, speaker: str, *, turn_end: bool) -> HypothesisDiff:
        self._check_open()
        return self._close_speaker(speaker)

    def finish(self) -> HypothesisDiff:
        self._check_open()
        self._finished = True
        diffs = [self._close_speaker(s) for s in list(self._open)]
        return HypothesisDiff(words=tuple(w for d in diffs for w in d.words),
                              utterances=tuple(u for d in diffs for u in d.utterances))


class FakeBundle:
    def __init__(self, name: str = "fake") -> None:
        self.name = name

    def describe(self) -> tuple[FakeModelInfo, ...]:
        return (FakeModelInfo(kind="words", name=self.name,
                              labels=tuple(DisfluencyLabel)),)

    def new_engine(self) -> FakeEngine:
        return FakeEngine()


# --- fixtures ----------------------------------------------------------------------------------

#: Limits small enough that tests reach them quickly; everything else keeps its default.
TEST_LIMITS = ServerLimits(idle_timeout_s=1.0, ended_retention_s=60.0, replay_updates=50,
                           follower_queue=64)


class Running:
    """A started server with a connected stub; closed by the fixture."""

    def __init__(self, server: MidstreamServer, channel: grpc.aio.Channel) -> None:
        self.server = server
        self.channel = channel
        self.stub = pb_grpc.MidstreamStub(channel)  # type: ignore[no-untyped-call]


ServerFactory = Callable[..., Awaitable[Running]]


@pytest.fixture(name="start_server")
async def start_server_fixture() -> AsyncIterator[ServerFactory]:
    """Start servers on port 0: ``await start_server(limits=..., bundle=..., **config)``."""
    started: list[Running] = []

    async def start(*, limits: ServerLimits = TEST_LIMITS, bundle: object | None = None,
                    **config: Any) -> Running:
        server = MidstreamServer(
            ServerConfig(host="127.0.0.1", port=0, grace_s=2.0, limits=limits, **config),
            bundle=bundle if bundle is not None else FakeBundle(),  # type: ignore[arg-type]
        )
        await server.start()
        channel = grpc.aio.insecure_channel(f"127.0.0.1:{server.port}")
        running = Running(server, channel)
        started.append(running)
        return running

    yield start
    for running in started:
        await running.server.stop(0)
        await running.channel.close()


@pytest.fixture(name="running")
async def running_fixture(start_server: ServerFactory) -> Running:
    return await start_server()


def spoken(word_id: str, text: str, speaker: str = "A", start: float | None = None,
           **extra: Any) -> pb.SpokenWord:
    """A wire word (tests build events with this)."""
    word = pb.SpokenWord(word_id=word_id, speaker=speaker, text=text, **extra)
    if start is not None:
        word.start_s = start
        word.end_s = start + 0.2
    return word


def words_event(*words: pb.SpokenWord) -> pb.ClientEvent:
    return pb.ClientEvent(words=pb.WordBatch(words=list(words)))


def open_event(conversation_id: str = "") -> pb.ClientEvent:
    return pb.ClientEvent(open=pb.OpenConversation(conversation_id=conversation_id))


CLOSE = pb.ClientEvent(close=pb.CloseConversation())


class Caller:
    """The ingesting side of one ``Converse`` stream, driven event by event."""

    def __init__(self, stub: pb_grpc.MidstreamStub) -> None:
        self.call = stub.Converse()
        self.updates: list[pb.Update] = []

    async def open(self, conversation_id: str = "") -> str:
        await self.call.write(open_event(conversation_id))
        message = await self.call.read()
        assert message.WhichOneof("body") == "welcome"
        return str(message.welcome.conversation_id)

    async def send(self, event: pb.ClientEvent) -> pb.Update:
        """Send an event that changes something and read its update."""
        await self.call.write(event)
        message = await self.call.read()
        assert message.WhichOneof("body") == "update", message
        update: pb.Update = message.update
        self.updates.append(update)
        return update

    async def close(self) -> pb.Ended:
        """Send ``close``, collect the final update, return ``ended``."""
        await self.call.write(CLOSE)
        await self.call.done_writing()
        final = await self.call.read()
        self.updates.append(final.update)
        assert final.update.conversation_final
        ended: pb.Ended = (await self.call.read()).ended
        return ended


async def follow_all(stub: pb_grpc.MidstreamStub, conversation_id: str,
                     from_seq: int | None = None) -> list[pb.ServerMessage]:
    """Every message of a ``Follow`` stream until it ends."""
    request = pb.FollowRequest(conversation_id=conversation_id)
    if from_seq is not None:
        request.from_seq = from_seq
    return [m async for m in stub.Follow(request)]
