"""Faults: stalled followers, vanished callers, server restarts, failed reloads, bursts.

Each test injects one fault into a real server over real gRPC and checks that nobody loses an
update silently, nobody hangs (every wait has a deadline) and the ingesting caller keeps going.
The clean endings of a Feed stream (cancel, half-close, idle, shutdown) are covered by
``tests/server/test_lifecycle.py``; these tests add faults from outside the process and load.

Two channel options make HTTP/2 flow control small and fixed so that "stops reading" reaches
the server after a few messages instead of after megabytes of transport buffers: without them,
grpc grows a reader's window (BDP probing) and buffers thousands of updates for it.
"""

from __future__ import annotations

import asyncio
import contextlib
import signal
import sys
from pathlib import Path

import grpc
import pytest
from midstream import HypothesisUpdate, NotFoundError
from midstream.client import Client, Gap, GapReason, Reconnected, RetryPolicy, Snapshot
from midstream.server import ServerLimits
from midstream.wire import midstream_pb2 as pb
from midstream.wire import midstream_pb2_grpc as pb_grpc
from reliability_kit import (  # noqa: F401 - fixtures are found by name
    CLOSE,
    SMALL_LIMITS,
    WAIT_S,
    Running,
    ServerFactory,
    bundle_fixture,
    models_dir_fixture,
    open_event,
    spoken,
    start_server_fixture,
    words_event,
)

pytestmark = pytest.mark.corpus  # the models are trained from SwDA when none are shipped

#: A reader whose HTTP/2 window stays at about 1 KB, so a stalled reader stalls its sender soon.
SMALL_WINDOW = [("grpc.http2.bdp_probe", 0), ("grpc.http2.lookahead_bytes", 1024)]


def _channel(running: Running) -> grpc.aio.Channel:
    return grpc.aio.insecure_channel(f"127.0.0.1:{running.server.port}", options=SMALL_WINDOW)


def _word(i: int) -> pb.ClientEvent:
    return words_event(spoken(f"w{i}", ("so", "uh", "we", "went")[i % 4], speaker="AB"[i % 2],
                              start=float(i)))


async def _open(stub: pb_grpc.MidstreamStub,
                ) -> tuple[grpc.aio.StreamStreamCall[pb.ClientEvent, pb.ServerMessage], str]:
    call = stub.Feed()
    await call.write(open_event())
    welcome = await asyncio.wait_for(call.read(), WAIT_S)
    return call, str(welcome.welcome.conversation_id)


async def _send(call: grpc.aio.StreamStreamCall[pb.ClientEvent, pb.ServerMessage],
                event: pb.ClientEvent) -> pb.Update:
    await call.write(event)
    message = await asyncio.wait_for(call.read(), WAIT_S)
    assert isinstance(message, pb.ServerMessage) and message.WhichOneof("body") == "update"
    update: pb.Update = message.update
    return update


async def _drain(stream: grpc.aio.UnaryStreamCall[pb.FollowRequest, pb.ServerMessage],
                 ) -> list[pb.ServerMessage]:
    async with asyncio.timeout(WAIT_S):
        return [m async for m in stream]


async def _rest(call: grpc.aio.StreamStreamCall[pb.ClientEvent, pb.ServerMessage],
                ) -> list[pb.ServerMessage]:
    """Every message left on a Feed call driven with read/write, until it ends."""
    messages = []
    async with asyncio.timeout(WAIT_S):
        while isinstance(message := await call.read(), pb.ServerMessage):
            messages.append(message)
    return messages


def _final_words(messages: list[pb.ServerMessage]) -> dict[str, pb.WordState]:
    """The last published state of every word, snapshots included."""
    states: dict[str, pb.WordState] = {}
    for message in messages:
        body = message.snapshot if message.HasField("snapshot") else message.update
        for word in body.words:
            states[word.word_id] = word
        for word_id in getattr(body, "withdrawn_word_ids", ()):
            states.pop(word_id, None)
    return states


# --- a follower that stops reading ------------------------------------------------------------


async def test_stalled_follower_lags_and_the_caller_is_never_held_back(
    start_server: ServerFactory,
) -> None:
    running = await start_server()  # follower_queue=16
    call, conversation = await _open(running.stub)
    follower_channel = _channel(running)
    stalled = pb_grpc.MidstreamStub(follower_channel).Follow(  # type: ignore[no-untyped-call]
        pb.FollowRequest(conversation_id=conversation, from_seq=1))
    await asyncio.sleep(0.2)  # registered, and never read from until the caller is done
    session = running.server.servicer.registry.get(conversation)
    # The caller sends 400 events; each must come back as its update (within WAIT_S) although
    # the follower stopped reading long before.
    lagged_at: int | None = None
    caller_updates = []
    for i in range(400):
        caller_updates.append(await _send(call, _word(i)))
        # The server's own queue, observed from inside: it never holds more than its limit.
        (follower,) = session._followers
        assert len(follower._queue) <= SMALL_LIMITS.follower_queue
        if lagged_at is None and follower._lagged_from is not None:
            lagged_at = i
    assert [u.seq for u in caller_updates] == list(range(1, 401))
    # The follower's queue filled early, and the caller carried on for hundreds more events.
    assert lagged_at is not None and lagged_at < 100
    await call.write(CLOSE)
    await call.done_writing()
    closing = await _rest(call)
    assert closing[-1].ended.reason == pb.END_REASON_CLOSED

    seen = await _drain(stalled)
    kinds = [m.WhichOneof("body") for m in seen]
    gap_at = kinds.index("gap")
    gap = seen[gap_at].gap
    assert gap.reason == pb.GAP_REASON_LAGGED
    # What came before the gap is exactly updates 1 .. first_missing - 1, then a snapshot.
    assert [m.update.seq for m in seen[:gap_at]] == list(range(1, gap.first_missing))
    assert seen[:gap_at] == [pb.ServerMessage(update=u) for u in caller_updates[:gap_at]]
    assert kinds[gap_at + 1] == "snapshot"
    snapshot = seen[gap_at + 1].snapshot
    assert snapshot.seq >= gap.first_missing
    # Then live again without a hole, through the final update and `ended`.
    after = [m.update for m in seen[gap_at + 2:-1]]
    assert [u.seq for u in after] == list(range(snapshot.seq + 1, snapshot.seq + 1 + len(after)))
    # The end is marked by the final update, or by the snapshot when it was taken after it.
    assert after[-1].conversation_final if after else snapshot.conversation_final
    assert seen[-1].ended.reason == pb.END_REASON_CLOSED
    assert seen[-1].ended.last_seq == closing[0].update.seq
    # Nothing was lost for good: every word ended final in what the follower was given.
    final = _final_words(seen)
    assert set(final) == {f"w{i}" for i in range(400)}
    assert all(w.final for w in final.values())
    # And it can resume losslessly from the replay buffer after catching up.
    resumed = await _drain(running.stub.Follow(pb.FollowRequest(
        conversation_id=conversation, from_seq=session.oldest_kept, epoch=session.epoch)))
    assert [m.update.seq for m in resumed[:-1]] == list(
        range(session.oldest_kept, session.seq + 1))
    await follower_channel.close()


# --- a caller that vanishes -------------------------------------------------------------------

_CLIENT = """
import asyncio, sys, grpc
from midstream.wire import midstream_pb2 as pb, midstream_pb2_grpc as pb_grpc
async def main():
    channel = grpc.aio.insecure_channel(sys.argv[1])
    call = pb_grpc.MidstreamStub(channel).Feed()
    await call.write(pb.ClientEvent(open=pb.OpenConversation()))
    welcome = await call.read()
    for i, text in enumerate(["so", "we", "went"]):
        word = pb.SpokenWord(word_id=f"w{i}", speaker="A", text=text, start_s=float(i))
        await call.write(pb.ClientEvent(words=pb.WordBatch(words=[word])))
        await call.read()
    print(welcome.welcome.conversation_id, flush=True)
    await asyncio.sleep(3600)
asyncio.run(main())
"""


async def _client_process(running: Running) -> tuple[asyncio.subprocess.Process, str]:
    process = await asyncio.create_subprocess_exec(
        sys.executable, "-c", _CLIENT, f"127.0.0.1:{running.server.port}",
        stdout=asyncio.subprocess.PIPE)
    assert process.stdout is not None
    line = await asyncio.wait_for(process.stdout.readline(), 60)
    return process, line.decode().strip()


@pytest.mark.parametrize(("fault", "reason"), [
    (signal.SIGKILL, pb.END_REASON_CALLER_VANISHED),
    (signal.SIGSTOP, pb.END_REASON_IDLE_TIMEOUT),
], ids=["killed", "frozen"])
async def test_vanished_caller_process_is_finalised_and_followers_told(
    start_server: ServerFactory, fault: signal.Signals, reason: pb.EndReason,
) -> None:
    # Killed: the kernel resets its connection. Frozen: the connection stays open and silent,
    # so only the idle timeout (1 s here) can end the conversation.
    running = await start_server()
    process, conversation = await _client_process(running)
    follower = asyncio.create_task(_drain(running.stub.Follow(
        pb.FollowRequest(conversation_id=conversation, from_seq=1))))
    await asyncio.sleep(0.2)
    try:
        process.send_signal(fault)
        seen = await follower
    finally:
        with contextlib.suppress(ProcessLookupError):
            process.kill()
        await process.wait()
    assert seen[-1].ended.reason == reason
    assert seen[-2].update.conversation_final
    final = _final_words(seen)
    assert set(final) == {"w0", "w1", "w2"} and all(w.final for w in final.values())
    assert [m.update.seq for m in seen[:-1]] == list(range(1, len(seen)))
    assert running.server.servicer.registry.live_count == 0


# --- a server restart -------------------------------------------------------------------------


async def test_followers_get_a_clear_answer_across_a_server_restart(
    start_server: ServerFactory,
) -> None:
    first = await start_server(limits=ServerLimits(idle_timeout_s=30.0))
    port = first.server.port
    call, conversation = await _open(first.stub)
    for i in range(3):
        await _send(call, _word(i))
    follower = asyncio.create_task(_drain(first.stub.Follow(
        pb.FollowRequest(conversation_id=conversation, from_seq=1))))
    await asyncio.sleep(0.2)
    await first.server.stop(1.0)
    seen = await follower
    assert seen[-1].ended.reason == pb.END_REASON_SERVER_SHUTDOWN
    last_seq = seen[-1].ended.last_seq

    # While nothing listens: UNAVAILABLE at once, not a hang.
    with pytest.raises(grpc.aio.AioRpcError) as info:
        await _drain(first.stub.Follow(pb.FollowRequest(conversation_id=conversation,
                                                        from_seq=last_seq + 1)))
    assert info.value.code() == grpc.StatusCode.UNAVAILABLE

    # A new server on the same port does not know the conversation: NOT_FOUND, naming it.
    # (wait_for_ready: channels to one address share a connection, which is still backing off
    # from the refused attempt above; a reconnecting follower waits for it.)
    second = await start_server(port=port)
    with pytest.raises(grpc.aio.AioRpcError) as info:
        await _drain(second.stub.Follow(pb.FollowRequest(conversation_id=conversation,
                                                         from_seq=last_seq + 1),
                                        wait_for_ready=True, timeout=WAIT_S))
    assert info.value.code() == grpc.StatusCode.NOT_FOUND
    assert conversation in (info.value.details() or "")
    # A follower that waits for its old channel to reconnect gets the same answer.
    with pytest.raises(grpc.aio.AioRpcError) as info:
        await _drain(first.stub.Follow(pb.FollowRequest(conversation_id=conversation),
                                       wait_for_ready=True, timeout=WAIT_S))
    assert info.value.code() == grpc.StatusCode.NOT_FOUND


async def test_a_follower_is_never_spliced_into_a_new_conversation_reusing_the_id(
    start_server: ServerFactory,
) -> None:
    # The caller re-opens its own id on a restarted server; a follower that had seen seq 1..6
    # of the first conversation resumes from 7. The new one has passed seq 7 too, so only the
    # epoch can tell the two apart: the follower gets a gap notice and the new state.
    first = await start_server(limits=ServerLimits(idle_timeout_s=30.0))
    port = first.server.port
    call = first.stub.Feed()
    await call.write(open_event("call-7"))
    old_epoch = (await asyncio.wait_for(call.read(), WAIT_S)).welcome.epoch
    follower = first.stub.Follow(pb.FollowRequest(conversation_id="call-7", from_seq=1))
    seen = [await _send(call, _word(i)) for i in range(6)]
    followed = [(await follower.read()).update for _ in range(6)]
    assert followed == seen and {u.epoch for u in seen} == {old_epoch}
    await first.server.stop(0)

    second = await start_server(port=port, limits=ServerLimits(idle_timeout_s=30.0))
    call = second.stub.Feed()
    await call.write(open_event("call-7"))
    new_epoch = (await asyncio.wait_for(call.read(), WAIT_S)).welcome.epoch
    assert new_epoch != old_epoch
    for i in range(10):
        await _send(call, _word(100 + i))
    resumed = second.stub.Follow(pb.FollowRequest(conversation_id="call-7", from_seq=7,
                                                  epoch=old_epoch))
    gap = (await asyncio.wait_for(resumed.read(), WAIT_S)).gap
    assert (gap.first_missing, gap.reason) == (7, pb.GAP_REASON_EPOCH_MISMATCH)
    snapshot = (await resumed.read()).snapshot
    assert (snapshot.seq, snapshot.epoch) == (10, new_epoch)
    assert {w.word_id for w in snapshot.words} == {f"w{100 + i}" for i in range(10)}
    live = await _send(call, _word(110))
    assert (await resumed.read()).update == live and live.epoch == new_epoch
    resumed.cancel()

    # The client library does the same for a follower that gives its epoch.
    async with Client(f"127.0.0.1:{port}") as client:
        events = client.follow("call-7", from_seq=7, epoch=old_epoch)
        gap_event = await anext(events)
        snapshot_event = await anext(events)
        await events.aclose()
    assert isinstance(gap_event, Gap) and gap_event.reason is GapReason.EPOCH_MISMATCH
    assert isinstance(snapshot_event, Snapshot) and snapshot_event.epoch == new_epoch
    call.cancel()


async def _serve_process(models_dir: Path, port: int = 0,
                         ) -> tuple[asyncio.subprocess.Process, int]:
    """``midstream serve`` in its own process; returns it and the port it listens on."""
    process = await asyncio.create_subprocess_exec(
        sys.executable, "-m", "midstream.client.cli._main", "serve", "--port", str(port),
        "--models", str(models_dir), stdout=asyncio.subprocess.PIPE)
    assert process.stdout is not None
    line = (await asyncio.wait_for(process.stdout.readline(), 60)).decode()
    assert line.startswith("serving on "), line
    return process, int(line.rsplit(":", 1)[1])


async def test_client_follower_across_a_killed_server_gets_not_found(models_dir: Path) -> None:
    # The server process dies without a goodbye (SIGKILL): no `ended` reaches the follower,
    # whose client library reconnects. A new server on the same port does not know the
    # conversation, and the follower must be told so (NotFoundError), not retry for ever.
    first, port = await _serve_process(models_dir)
    second: asyncio.subprocess.Process | None = None
    target = f"127.0.0.1:{port}"
    try:
        async with grpc.aio.insecure_channel(target) as channel, Client(
                target, retry=RetryPolicy(max_attempts=30, initial_backoff=0.2,
                                          max_backoff=1.0)) as client:
            call, conversation = await _open(
                pb_grpc.MidstreamStub(channel))  # type: ignore[no-untyped-call]
            for i in range(3):
                await _send(call, _word(i))
            seen: list[object] = []

            async def follow() -> None:
                async for event in client.follow(conversation, from_seq=1):
                    seen.append(event)

            follower = asyncio.create_task(follow())
            async with asyncio.timeout(WAIT_S):
                while len(seen) < 3:
                    await asyncio.sleep(0.05)
            first.kill()
            await first.wait()
            # The ingesting caller learns at once that its server is gone.
            assert await asyncio.wait_for(call.code(), WAIT_S) == grpc.StatusCode.UNAVAILABLE
            second, _ = await _serve_process(models_dir, port)
            with pytest.raises(NotFoundError, match=conversation):
                await asyncio.wait_for(follower, 60)
    finally:
        for process in (first, second):
            if process is not None and process.returncode is None:
                process.kill()
                await process.wait()
    assert [e.seq for e in seen[:3] if isinstance(e, HypothesisUpdate)] == [1, 2, 3]
    assert any(isinstance(e, Reconnected) and e.from_seq == 4 for e in seen)


# --- model reload failure under a live stream -------------------------------------------------


async def test_failed_reload_does_not_disturb_a_live_stream(
    start_server: ServerFactory, models_dir: Path, tmp_path: Path,
) -> None:
    running = await start_server(limits=ServerLimits(idle_timeout_s=30.0))
    call, conversation = await _open(running.stub)
    updates = [await _send(call, _word(i)) for i in range(5)]
    broken = tmp_path / "broken"
    broken.mkdir()
    for model in models_dir.glob("*.tagger"):
        data = model.read_bytes()
        (broken / model.name).write_bytes(data[: len(data) - 100])
    before = await running.stub.DescribeModels(pb.DescribeModelsRequest(), timeout=WAIT_S)
    with pytest.raises(grpc.aio.AioRpcError) as info:
        await running.stub.ReloadModels(pb.ReloadModelsRequest(directory=str(broken)),
                                        timeout=WAIT_S)
    assert info.value.code() == grpc.StatusCode.FAILED_PRECONDITION
    updates += [await _send(call, _word(i)) for i in range(5, 10)]
    assert [u.seq for u in updates] == list(range(1, 11))
    # A successful reload afterwards swaps models for new conversations only; the live one
    # keeps its engine and ends normally.
    reloaded = await running.stub.ReloadModels(
        pb.ReloadModelsRequest(directory=str(models_dir)), timeout=WAIT_S)
    assert [m.sha256 for m in reloaded.models] == [m.sha256 for m in before.models]
    updates.append(await _send(call, _word(10)))
    await call.write(CLOSE)
    await call.done_writing()
    closing = await _rest(call)
    assert closing[-1].ended.reason == pb.END_REASON_CLOSED
    assert closing[0].update.seq == updates[-1].seq + 1
    replies = [m async for m in running.stub.Feed(
        iter([open_event(), _word(0), CLOSE]), timeout=WAIT_S)]
    assert replies[-1].ended.reason == pb.END_REASON_CLOSED
    assert conversation != replies[0].welcome.conversation_id


# --- a burst --------------------------------------------------------------------------------


async def test_burst_from_a_caller_that_does_not_read_is_held_back_not_queued(
    start_server: ServerFactory,
) -> None:
    running = await start_server(limits=ServerLimits(idle_timeout_s=30.0, replay_updates=50))
    channel = _channel(running)
    call, conversation = await _open(pb_grpc.MidstreamStub(channel))  # type: ignore[no-untyped-call]
    session = running.server.servicer.registry.get(conversation)
    total = 2000
    writer = asyncio.create_task(_write_all(call, total))
    # The caller writes and never reads; the server stops taking its events once the caller's
    # window is full, instead of decoding ahead into queues nobody drains.
    await asyncio.sleep(1.0)
    held = session.seq
    await asyncio.sleep(1.0)
    assert session.seq == held < total
    assert len(session._replay) <= 50
    # Reading again releases everything, in order, with nothing lost.
    seqs: list[int] = []
    async with asyncio.timeout(60):
        while len(seqs) < total:
            message = await call.read()
            assert isinstance(message, pb.ServerMessage)
            seqs.append(message.update.seq)
        await writer
    assert seqs == list(range(1, total + 1))
    assert len(session._replay) <= 50
    call.cancel()
    await channel.close()


async def _write_all(call: grpc.aio.StreamStreamCall[pb.ClientEvent, pb.ServerMessage],
                     count: int) -> None:
    for i in range(count):
        await call.write(_word(i))
