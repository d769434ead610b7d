"""The async client and its sync wrapper against a real server with real models."""

from __future__ import annotations

import asyncio
import re
import threading
from pathlib import Path

import pytest
from client_kit import (  # noqa: F401 - fixtures are found by name
    CuttingProxy,
    Served,
    free_port,
    models_dir_fixture,
    served_fixture,
)
from midstream import (
    EventError,
    HypothesisUpdate,
    InputError,
    ModelError,
    NotFoundError,
    UnavailableError,
    Word,
    WordHypothesis,
)
from midstream.client import (
    AddWord,
    Client,
    Ended,
    EndReason,
    Gap,
    GapReason,
    Reconnected,
    RetryPolicy,
    Snapshot,
    SyncClient,
    Welcome,
)
from midstream.client._results import ServerEvent
from midstream.client.cli._demo_script import demo_events
from midstream.server import MidstreamServer, ServerConfig, ServerLimits

pytestmark = pytest.mark.corpus


async def _stream_demo(client: Client, conversation_id: str | None = None
                       ) -> tuple[str, list[ServerEvent]]:
    async with client.feed(conversation_id) as stream:
        for timed in demo_events():
            await stream.send(timed.event)
        await stream.close()
        events = [event async for event in stream]
    return stream.conversation_id, events


async def test_feed_yields_welcome_updates_in_sequence_then_ended(served: Served) -> None:
    async with Client(served.target) as client:
        conversation_id, events = await _stream_demo(client, "bike-shop-1")
    assert conversation_id == "bike-shop-1"
    welcome = events[0]
    assert isinstance(welcome, Welcome) and welcome.epoch > 0
    assert welcome == Welcome(conversation_id="bike-shop-1", next_seq=1, epoch=welcome.epoch)
    updates = [e for e in events if isinstance(e, HypothesisUpdate)]
    assert {u.epoch for u in updates} == {welcome.epoch}
    assert [u.seq for u in updates] == list(range(1, len(updates) + 1))
    assert updates[-1].conversation_final
    assert events[-1] == Ended(reason=EndReason.CLOSED, last_seq=updates[-1].seq)
    # Every word sent got a hypothesis, and every one is final at the end.
    latest: dict[str, WordHypothesis] = {}
    for update in updates:
        latest.update((w.word_id, w) for w in update.diff.words)
    sent = {t.event.word_id for t in demo_events() if isinstance(t.event, AddWord)}
    assert set(latest) == sent
    assert all(w.final for w in latest.values())


async def test_follow_sees_the_callers_sequence_and_resumes_after_a_cut(served: Served) -> None:
    events = [t.event for t in demo_events()]
    half = len(events) // 2
    proxy = CuttingProxy(served.server.port)
    port = await proxy.start()
    retry = RetryPolicy(max_attempts=5, initial_backoff=0.05)
    caller: list[ServerEvent] = []
    followed: list[ServerEvent] = []
    following = asyncio.Event()
    try:
        async with (Client(served.target) as client,
                    Client(f"127.0.0.1:{port}", retry=retry) as follower,
                    client.feed() as stream):
            for event in events[:half]:
                await stream.send(event)

            async def read() -> None:
                caller.extend([e async for e in stream])

            async def follow() -> None:
                async for event in follower.follow(stream.conversation_id, from_seq=1):
                    followed.append(event)
                    if isinstance(event, HypothesisUpdate) and event.seq >= 5:
                        following.set()

            reader = asyncio.create_task(read())
            watcher = asyncio.create_task(follow())
            await asyncio.wait_for(following.wait(), 30)
            # Cut while the conversation is live: the follower's stream cannot have ended.
            proxy.cut()
            for event in events[half:]:
                await stream.send(event)
            await stream.close()
            await asyncio.wait_for(reader, 30)
            await asyncio.wait_for(watcher, 30)
    finally:
        await proxy.stop()
    reconnects = [e for e in followed if isinstance(e, Reconnected)]
    assert len(reconnects) >= 1 and proxy.connections >= 2
    # Resumed from the next unseen seq: nothing missing, nothing twice, no gap needed.
    updates = [e for e in followed if isinstance(e, HypothesisUpdate)]
    assert updates == [e for e in caller if isinstance(e, HypothesisUpdate)]
    assert not any(isinstance(e, Gap) for e in followed)
    assert isinstance(followed[-1], Ended)


async def test_follow_without_position_starts_with_a_snapshot(served: Served) -> None:
    async with Client(served.target) as client:
        conversation_id, _ = await _stream_demo(client)
        followed = [e async for e in client.follow(conversation_id)]
    assert isinstance(followed[0], Snapshot) and followed[0].conversation_final
    assert isinstance(followed[-1], Ended)


async def test_follow_to_a_server_that_is_not_there_says_so_at_once() -> None:
    # Nothing to reconnect to: a follower never heard from the server reports that plainly
    # instead of announcing reconnects to a server it never reached.
    retry = RetryPolicy(max_attempts=3, initial_backoff=0.01, max_backoff=0.02)
    seen: list[ServerEvent] = []
    async with Client(f"127.0.0.1:{free_port()}", retry=retry) as client:
        with pytest.raises(UnavailableError, match=r"127\.0\.0\.1.*cannot reach the server"):
            async for event in client.follow("anything"):
                seen.append(event)
    assert seen == []


async def test_follow_gives_up_after_bounded_retries_once_its_stream_is_lost(
        served: Served) -> None:
    proxy = CuttingProxy(served.server.port)
    port = await proxy.start()
    retry = RetryPolicy(max_attempts=2, initial_backoff=0.01, max_backoff=0.02, seed=1)
    seen: list[ServerEvent] = []
    async with (Client(served.target) as client,
                Client(f"127.0.0.1:{port}", retry=retry) as follower,
                client.feed() as stream):
        await stream.send_words([AddWord(word_id="w1", word=Word(text="so", speaker="A"))])
        with pytest.raises(UnavailableError, match="stream was lost; gave up after 2 reconnect"):
            async for event in follower.follow(stream.conversation_id):
                seen.append(event)
                if isinstance(event, Snapshot):
                    await proxy.stop()  # the network path is gone for good
    assert isinstance(seen[0], Snapshot)
    assert seen[1:] == [Reconnected(from_seq=seen[0].seq + 1, attempt=n) for n in (1, 2)]


def test_reconnect_waits_are_jittered_within_bounds_and_reproducible_with_a_seed() -> None:
    policy = RetryPolicy(initial_backoff=0.2, multiplier=2.0, max_backoff=5.0, jitter=0.5,
                         seed=42)
    full = [policy.delay(n) for n in range(1, 9)]
    assert full == [0.2, 0.4, 0.8, 1.6, 3.2, 5.0, 5.0, 5.0]
    rng = policy.random_source()
    waits = [policy.delay(n, rng) for n in range(1, 9)]
    # Each wait lies in [(1 - jitter) * full, full], and they are not all the full wait.
    assert all(0.5 * f <= w <= f for w, f in zip(waits, full, strict=True))
    assert len({round(w / f, 6) for w, f in zip(waits, full, strict=True)}) > 1
    # The same seed draws the same waits; another seed others.
    again = policy.random_source()
    assert [policy.delay(n, again) for n in range(1, 9)] == waits
    other = RetryPolicy(seed=43).random_source()
    assert [policy.delay(n, other) for n in range(1, 9)] != waits
    # No jitter: the documented exponential schedule exactly.
    plain = RetryPolicy(jitter=0.0)
    assert [plain.delay(n, plain.random_source()) for n in range(1, 9)] == full
    with pytest.raises(InputError, match="jitter"):
        RetryPolicy(jitter=1.5)


async def test_batch_listing_revisions_and_models(served: Served) -> None:
    async with Client(served.target) as client:
        conversation_id, events = await _stream_demo(client)
        history = await client.revisions(conversation_id)
        listed = {c.conversation_id: c for c in await client.list_conversations()}
        models = await client.describe_models()
    updates = [e for e in events if isinstance(e, HypothesisUpdate)]
    assert listed[conversation_id].ended
    assert listed[conversation_id].last_seq == updates[-1].seq
    assert {m.kind for m in models} == {"words", "utterance_functions", "boundaries"}
    # The history holds exactly the states the stream published, seq by seq.
    published = [(u.seq, s) for u in updates for s in (*u.diff.words, *u.diff.utterances)]
    assert sorted(((r.seq, r.state) for r in history.revisions), key=lambda p: p[0]) == sorted(
        published, key=lambda p: p[0])


async def test_errors_are_midstream_errors(served: Served, tmp_path: Path) -> None:
    async with Client(served.target) as client:
        with pytest.raises(NotFoundError, match="nope"):
            await client.revisions("nope")
        (tmp_path / "broken.tagger").write_bytes(b"not a model at all")
        with pytest.raises(ModelError):
            await client.reload_models(str(tmp_path))
        with pytest.raises(EventError):
            async with client.feed() as stream:
                await stream.send_words([AddWord(word_id="a", word=Word(text="hi",
                                                                        speaker="A"))])
                await stream.withdraw_word("never-sent")
                async for _ in stream:
                    pass


async def test_client_lifecycle_is_explicit() -> None:
    client = Client("127.0.0.1:1")
    with pytest.raises(UnavailableError, match="not connected"):
        await client.list_conversations()
    await client.connect()
    await client.close()
    await client.close()  # idempotent


def test_sync_client_wraps_the_async_one(served: Served) -> None:
    events = [t.event for t in demo_events() if isinstance(t.event, AddWord)]
    with SyncClient(served.target) as client:
        tagged = client.tag_transcript(events)
        conversation_id = client.list_conversations()[0].conversation_id
        followed = list(client.follow(conversation_id, from_seq=1))
    assert len(tagged.words) == len(events) and all(w.final for w in tagged.words)
    assert isinstance(followed[-1], Ended)
    with pytest.raises(UnavailableError, match="not connected"):
        client.describe_models()


def test_a_sync_client_that_fails_to_connect_leaves_no_loop_running() -> None:
    # Certificates given as text, not bytes: the channel cannot be made, so __enter__ raises
    # and ``with`` never calls __exit__; the wrapper must still stop and close its own loop.
    before = set(threading.enumerate())
    bad = SyncClient("127.0.0.1:1", tls=True, root_certificates="not bytes")  # type: ignore[arg-type]
    with pytest.raises(TypeError, match="bytes"), bad:
        pass
    assert not [t for t in set(threading.enumerate()) - before
                if t.name == "midstream-sync-client"]


async def test_the_token_is_sent_and_a_missing_one_is_named(models_dir: Path) -> None:
    server = MidstreamServer(ServerConfig(host="127.0.0.1", port=0, models_dir=models_dir,
                                          token="s3cret", grace_s=0.5))
    await server.start()
    try:
        target = f"127.0.0.1:{server.port}"
        async with Client(target, token="s3cret") as client:
            assert await client.describe_models()
        async with Client(target) as client:
            with pytest.raises(InputError, match="UNAUTHENTICATED"):
                await client.list_conversations()
        async with Client(target, token="wrong") as client:
            with pytest.raises(InputError, match=re.escape(target)):
                await client.list_conversations()
    finally:
        await server.stop(0.5)


async def test_a_follower_asking_for_evicted_updates_is_told_of_the_gap(models_dir: Path) -> None:
    limits = ServerLimits(replay_updates=10)
    server = MidstreamServer(ServerConfig(host="127.0.0.1", port=0, models_dir=models_dir,
                                          limits=limits, grace_s=0.5))
    await server.start()
    try:
        async with Client(f"127.0.0.1:{server.port}") as client:
            conversation_id, events = await _stream_demo(client)
            followed = [e async for e in client.follow(conversation_id, from_seq=1)]
    finally:
        await server.stop(0.5)
    last = max(e.seq for e in events if isinstance(e, HypothesisUpdate))
    gap, snapshot = followed[0], followed[1]
    assert isinstance(gap, Gap) and gap.reason is GapReason.EVICTED and gap.first_missing == 1
    assert isinstance(snapshot, Snapshot) and snapshot.conversation_final
    # After the snapshot, only what the buffer still held: the last updates, in order.
    after = [e.seq for e in followed if isinstance(e, HypothesisUpdate)]
    assert after == list(range(snapshot.seq + 1, last + 1))
    assert isinstance(followed[-1], Ended)


async def test_resume_needs_an_id_and_an_epoch_only_comes_with_resume() -> None:
    # Refused before anything is sent: no server is needed.
    async with Client("127.0.0.1:9") as client:
        with pytest.raises(InputError, match="resume=True continues a conversation by its id"):
            client.feed(None, resume=True, epoch=5)
        with pytest.raises(InputError, match="epoch names the conversation resume=True"):
            client.feed("call-1", epoch=5)
        stream = client.feed_many()
        with pytest.raises(InputError, match="resume=True continues a conversation by its id"):
            stream.open(resume=True)
        with pytest.raises(InputError, match="epoch names the conversation resume=True"):
            stream.open("call-1", epoch=5)
        assert stream.queued == 0
