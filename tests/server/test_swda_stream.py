"""A real SwDA val conversation streamed word by word ends where the batch call does."""

from __future__ import annotations

from pathlib import Path

import pytest
from midstream.corpora import read_corpus
from midstream.wire import convert as cv
from midstream.wire import midstream_pb2 as pb
from server_kit import (  # noqa: F401 - fixtures are found by name
    CLOSE,
    Running,
    bundle_fixture,
    models_dir_fixture,
    open_event,
    running_fixture,
    start_server_fixture,
    words_event,
)


@pytest.mark.corpus
async def test_swda_val_conversation_streamed_equals_tagged_transcript(
    running: Running, swda_dir: Path,
) -> None:
    # The first val conversation (val, never test) short enough to keep the test quick.
    conversation = next(c for c in read_corpus(swda_dir, split="val") if len(c.words) <= 800)
    spoken = [cv.spoken_word_to_wire(f"w{i}", w) for i, w in enumerate(conversation.words)]
    assert len(spoken) >= 50
    events = [open_event(), *(words_event(w) for w in spoken), CLOSE]
    messages = [m async for m in running.stub.Feed(iter(events))]
    assert messages[-1].ended.reason == pb.END_REASON_CLOSED
    streamed_words: dict[str, pb.WordState] = {}
    streamed_utterances: dict[str, pb.UtteranceState] = {}
    for message in messages:
        for word in message.update.words:
            streamed_words[word.word_id] = word
        for utterance in message.update.utterances:
            streamed_utterances[utterance.utterance_id] = utterance
    # Utterances that a later revision dissolved end with no words; the batch never shows them.
    streamed_utterances = {k: u for k, u in streamed_utterances.items() if u.word_ids}
    reply = await running.stub.TagTranscript(pb.TagTranscriptRequest(
        items=[pb.TranscriptItem(word=w) for w in spoken]))
    batch_words = {w.word_id: w for w in reply.words}
    assert len(batch_words) == len(spoken)
    assert all(w.final for w in streamed_words.values())
    assert {k: (w.role, w.repaired_by, w.interruption_point)
            for k, w in streamed_words.items()} == {
        k: (w.role, w.repaired_by, w.interruption_point) for k, w in batch_words.items()}
    assert {k: (tuple(u.word_ids), u.function, u.fine_class, u.clean_text)
            for k, u in streamed_utterances.items()} == {
        u.utterance_id: (tuple(u.word_ids), u.function, u.fine_class, u.clean_text)
        for u in reply.utterances if u.word_ids}
