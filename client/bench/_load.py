"""A load generator for a Midstream server: many concurrent conversations at a fixed word rate.

:func:`run_load` opens ``conversations`` ``Feed`` streams over a few channels, and each sends
one word per event at ``rate`` words per second for ``seconds`` seconds, taken from real
transcripts (:class:`WordScript`). For every word it times the interval from just before the
write to the first update naming that word's id (the word's first hypothesis), and it counts
errors by gRPC status code (plus ``OPEN_TIMEOUT`` and ``SETTLE_TIMEOUT``, the generator's own:
a conversation not opened in time, or one whose last updates had not arrived 10 s after the
window). The ``describe`` workload sends a trivial ``DescribeModels`` call at
the same rate instead: the transport round trip against which tagging is compared.

With ``multiplex`` the conversations ride ``FeedMany`` streams instead, one per channel:
every ``tick_s`` each stream sends one frame holding every word that fell due on it since the
last frame. Latency is then timed from each word's *scheduled* time, not from the frame's
write, so the wait for the next tick is inside the figure. The ``describe`` workload then makes
one ``DescribeModels`` call per stream per tick that has words due, timed the same way: the
transport round trip of the frames.

:class:`ProcessProbe` reads a local server's CPU time and resident memory from ``/proc``;
:func:`read_steal` reads how long a virtual machine's hypervisor kept each of this host's CPUs
for other guests (steal time), which stalls the server and the generator alike and shows in the
latency tails although neither did more work; a
:class:`~midstream.client.bench._scrape.MetricsProbe` reads how late the server's own event loop ran
over the window, which tells a busy or stalled server from a slow transport or generator.

This module talks protobuf directly (the :class:`~midstream.client.Client` converts every
update to domain types, which would make the generator, not the server, the bottleneck). It
imports no model code. Use from one event loop; nothing here is thread-safe.
"""

from __future__ import annotations

import asyncio
import heapq
import math
import os
import random
import time
from collections import Counter
from collections.abc import AsyncIterator, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal

import grpc
import grpc.aio
from midstream import InputError
from midstream.client.bench._scrape import Histogram, MetricsProbe
from midstream.wire import midstream_pb2 as pb
from midstream.wire import midstream_pb2_grpc as pb_grpc

Workload = Literal["feed", "describe"]

#: Percentiles reported, in percent.
PERCENTILES: tuple[int, ...] = (50, 95, 99)
#: Status name counted for a conversation that never got its ``welcome`` in time.
OPEN_TIMEOUT = "OPEN_TIMEOUT"
#: Counted for a conversation whose updates had not all come back in time after the window.
SETTLE_TIMEOUT = "SETTLE_TIMEOUT"
#: Seconds a conversation waits for updates of its last words after it stopped sending.
_SETTLE_S = 10.0
#: Steal time (share of the window, on any CPU) above which a run counts as disturbed by the
#: hypervisor. Set from this project's own runs on a 2-CPU virtual machine (no source): the
#: first four runs that recorded it met the latency budget at 0.05 % and missed it at 0.4 % and
#: more; later runs met it at 1-3 % too. So it marks a run to read with care, not a failed one.
STEAL_NOTABLE_PERCENT = 0.1
#: Most events the generator puts in one ``FeedMany`` frame: the server's default
#: ``max_events_per_frame`` (docs/limits.md), over which it refuses the frame and ends the
#: stream. Opening or closing more conversations than this at once takes several frames.
MAX_FRAME_EVENTS = 1024
#: Default seconds between two frames of a multiplexed stream (common practice for audio
#: front ends is 10-20 ms packets, from memory; a word due just after a frame waits this long).
DEFAULT_TICK_S = 0.01


@dataclass(frozen=True, slots=True, kw_only=True)
class LoadConfig:
    """One load run.

    ``rate`` is words per second per conversation; ``seconds`` is how long each conversation
    sends after all are open; ``ramp_s`` spreads the opening of the conversations (seconds).
    ``channels`` is how many HTTP/2 connections carry the streams. ``multiplex`` carries the
    conversations over one ``FeedMany`` stream per channel, sending a frame every
    ``tick_s`` seconds.
    """

    target: str
    conversations: int
    rate: float = 3.0
    seconds: float = 60.0
    ramp_s: float = 5.0
    channels: int = 4
    workload: Workload = "feed"
    token: str | None = field(default=None, repr=False)
    tls: bool = False
    tls_ca: Path | None = None
    seed: int = 0
    multiplex: bool = False
    tick_s: float = DEFAULT_TICK_S

    def __post_init__(self) -> None:
        if self.conversations < 1:
            raise InputError(f"conversations must be at least 1, got {self.conversations}")
        if not self.rate > 0 or not math.isfinite(self.rate):
            raise InputError(f"rate must be a positive number of words/s, got {self.rate}")
        if not self.seconds > 0 or not math.isfinite(self.seconds):
            raise InputError(f"seconds must be above 0, got {self.seconds}")
        if self.ramp_s < 0 or self.channels < 1:
            raise InputError("ramp_s must be >= 0 and channels >= 1")
        if not 0 < self.tick_s <= 1:
            raise InputError(f"tick_s must be above 0 and at most 1 second, got {self.tick_s}")


#: Words further into its transcript each lap of conversations starts (about five and a half
#: minutes of speech at 3 words/s; a prime, so laps rarely land on each other).
_LAP_STRIDE = 997


class WordScript:
    """The words each simulated conversation speaks: real transcripts, cycled.

    Parameters
    ----------
    transcripts
        Conversations as ``(speaker, text)`` sequences, in speaking order.

    Examples
    --------
    >>> script = WordScript([[("A", "uh"), ("A", "yes")], [("B", "so")]])
    >>> [script.word(1, k) for k in range(3)]
    [('B', 'so'), ('A', 'uh'), ('A', 'yes')]
    """

    def __init__(self, transcripts: Sequence[Sequence[tuple[str, str]]]) -> None:
        # One flat ring: conversation i starts at its own offset so that concurrent
        # conversations are not in lock-step on the same words.
        self._words = [word for transcript in transcripts for word in transcript]
        if not self._words:
            raise InputError("the word script is empty: the transcripts hold no words")
        self._starts = [0]
        for transcript in transcripts[:-1]:
            self._starts.append(self._starts[-1] + len(transcript))

    @property
    def total_words(self) -> int:
        return len(self._words)

    def word(self, conversation: int, index: int) -> tuple[str, str]:
        """The ``index``-th (speaker, text) of simulated conversation ``conversation``."""
        lap, first = divmod(conversation, len(self._starts))
        # Past the last transcript, conversations start further into theirs on every lap, so
        # no two concurrent conversations speak the same words at the same time (which would
        # let the server's shared caches serve both from one entry).
        start = self._starts[first] + lap * _LAP_STRIDE
        return self._words[(start + index) % len(self._words)]


@dataclass(frozen=True, slots=True, kw_only=True)
class ProcessSample:
    """CPU seconds (user + system) and resident set size (bytes) of a process at a moment."""

    wall: float
    cpu_s: float
    rss_bytes: int


class ProcessProbe:
    """Reads a local process's CPU time and RSS from ``/proc`` (Linux only).

    ``children=True`` adds its child processes' (``serve --workers``: the workers do the work,
    the supervising process waits).
    """

    def __init__(self, pid: int, *, children: bool = False) -> None:
        self.pid = pid
        self._children = children
        self._tick = os.sysconf("SC_CLK_TCK")
        self._page = os.sysconf("SC_PAGE_SIZE")

    def sample(self) -> ProcessSample:
        """The process's counters now (with its children's, when asked).

        Raises
        ------
        InputError
            When the process does not exist or ``/proc`` cannot be read.
        """
        own = self._sample(self.pid)
        if not self._children:
            return own
        cpu, rss = own.cpu_s, own.rss_bytes
        try:
            listed = Path(f"/proc/{self.pid}/task/{self.pid}/children").read_text("ascii")
        except OSError:
            listed = ""
        for child in listed.split():
            try:
                sample = self._sample(int(child))
            except InputError:
                continue  # exited between the listing and the read
            cpu += sample.cpu_s
            rss += sample.rss_bytes
        return ProcessSample(wall=own.wall, cpu_s=cpu, rss_bytes=rss)

    def _sample(self, pid: int) -> ProcessSample:
        try:
            stat = Path(f"/proc/{pid}/stat").read_text(encoding="ascii")
            statm = Path(f"/proc/{pid}/statm").read_text(encoding="ascii")
        except OSError as exc:
            raise InputError(f"cannot read /proc/{pid}: {exc.strerror} (is the server "
                             "process local and alive?)") from None
        # Fields after the parenthesised command name, which may itself hold spaces.
        fields = stat[stat.rindex(")") + 2:].split()
        utime, stime = int(fields[11]), int(fields[12])
        return ProcessSample(wall=time.perf_counter(), cpu_s=(utime + stime) / self._tick,
                             rss_bytes=int(statm.split()[1]) * self._page)


def read_steal() -> tuple[float, ...] | None:
    """Seconds of steal time of each CPU of this host since boot (``cpu0`` first), or None.

    Steal is the time a virtual machine's CPU was ready to run but the hypervisor ran another
    guest (the 8th counter of each ``cpuN`` line of ``/proc/stat``, in clock ticks). None where
    ``/proc/stat`` is missing or has no steal counter (not Linux, or a kernel before 2.6.11).
    """
    try:
        lines = Path("/proc/stat").read_text(encoding="ascii").splitlines()
    except OSError:
        return None
    return parse_steal(lines, os.sysconf("SC_CLK_TCK"))


def parse_steal(lines: Sequence[str], ticks_per_s: int) -> tuple[float, ...] | None:
    """The per-CPU steal seconds in ``/proc/stat`` lines (the all-CPU ``cpu`` line is
    skipped); None when a CPU line has no steal counter or there is none."""
    steal: list[float] = []
    for line in lines:
        name, _, rest = line.partition(" ")
        if not (name.startswith("cpu") and name[3:].isdigit()):
            continue
        counters = rest.split()
        if len(counters) < 8:
            return None
        steal.append(int(counters[7]) / ticks_per_s)
    return tuple(steal) if steal else None


@dataclass(slots=True, kw_only=True)
class LoadResult:
    """What one load run measured; latencies in seconds."""

    config: LoadConfig
    opened: int = 0
    words_sent: int = 0
    words_answered: int = 0
    answered_in_window: int = 0
    measured_s: float = 0.0
    latencies: list[float] = field(default_factory=list)
    send_lag: list[float] = field(default_factory=list)
    errors: Counter[str] = field(default_factory=Counter)
    client_cpu_s: float = 0.0
    server_before: ProcessSample | None = None
    server_open: ProcessSample | None = None
    server_after: ProcessSample | None = None
    #: Per-CPU steal seconds (:func:`read_steal`) when the window opened and when it closed.
    steal_open: tuple[float, ...] | None = None
    steal_after: tuple[float, ...] | None = None
    #: The server's loop-lag histogram (:class:`~midstream.client.bench._scrape.MetricsProbe`) when
    #: the window opened and when it closed, and why it could not be read, if it could not.
    loop_lag_open: Histogram | None = None
    loop_lag_after: Histogram | None = None
    loop_lag_error: str | None = None

    @property
    def achieved_wps(self) -> float:
        """Words (or calls) answered within the sending window, per second, all conversations.

        Answers that arrive after the window (a server catching up) do not count.
        """
        return self.answered_in_window / self.measured_s if self.measured_s > 0 else 0.0

    def summary(self) -> dict[str, Any]:
        """Every figure as plain JSON-ready values (times in ms, memory in bytes)."""
        config = self.config
        out: dict[str, Any] = {
            "target": config.target,
            "workload": config.workload,
            "conversations": config.conversations,
            "rate_per_conversation": config.rate,
            "offered_wps": config.conversations * config.rate,
            "seconds": config.seconds,
            "channels": config.channels,
            "multiplex": config.multiplex,
            "tick_ms": round(1000 * config.tick_s, 3) if config.multiplex else None,
            "opened": self.opened,
            "words_sent": self.words_sent,
            "words_answered": self.words_answered,
            "answered_in_window": self.answered_in_window,
            "measured_s": round(self.measured_s, 3),
            "achieved_wps": round(self.achieved_wps, 2),
            "latency_ms": _distribution(self.latencies),
            "send_lag_ms": _distribution(self.send_lag),
            "errors": dict(sorted(self.errors.items())),
            "error_count": sum(self.errors.values()),
            "client_cpu_percent": round(100 * self.client_cpu_s / self.measured_s, 1)
            if self.measured_s > 0 else 0.0,
        }
        out["server"] = self._server_summary()
        out["steal"] = self._steal_summary()
        out["server_loop_lag"] = self._loop_lag_summary()
        return out

    def _loop_lag_summary(self) -> dict[str, Any] | None:
        """The window's loop-lag probes and the buckets (ms, ``[lower, upper]``, ``upper``
        None past the last bucket) its p50, p99 and worst probe fell in."""
        if self.loop_lag_error is not None:
            return {"error": self.loop_lag_error}
        opened, after = self.loop_lag_open, self.loop_lag_after
        if opened is None or after is None:
            return None
        try:
            window = after.since(opened)
        except InputError as exc:
            return {"error": str(exc)}
        out: dict[str, Any] = {"probes": window.total}
        for key, quantile in (("p50_ms", 0.5), ("p99_ms", 0.99), ("max_ms", 1.0)):
            bucket = window.bucket_of(quantile)
            out[key] = None if bucket is None else [
                round(1000 * bucket[0], 3),
                round(1000 * bucket[1], 3) if math.isfinite(bucket[1]) else None]
        return out

    def _steal_summary(self) -> dict[str, Any] | None:
        opened, after = self.steal_open, self.steal_after
        if opened is None or after is None or len(opened) != len(after) \
                or self.measured_s <= 0:
            return None
        per_cpu = [round(1000 * (b - a), 1) for a, b in zip(opened, after, strict=True)]
        return {"per_cpu_ms": per_cpu,
                "max_percent": round(max(per_cpu) / 10 / self.measured_s, 3)}

    def _server_summary(self) -> dict[str, Any] | None:
        before, opened, after = self.server_before, self.server_open, self.server_after
        if before is None or opened is None or after is None:
            return None
        window = after.wall - opened.wall
        live = max(self.opened, 1)
        return {
            "cpu_percent": round(100 * (after.cpu_s - opened.cpu_s) / window, 1)
            if window > 0 else 0.0,
            "rss_before_bytes": before.rss_bytes,
            "rss_open_bytes": opened.rss_bytes,
            "rss_after_bytes": after.rss_bytes,
            # Right after opening (no words yet) and at the end of the window (every
            # conversation holding the words it was sent): RSS growth over live conversations.
            "bytes_per_open_conversation": round((opened.rss_bytes - before.rss_bytes) / live),
            "bytes_per_conversation_after": round((after.rss_bytes - before.rss_bytes) / live),
        }


def _distribution(values: Sequence[float]) -> dict[str, float]:
    """p50/p95/p99/max/mean in milliseconds (nearest-rank percentiles); zeros when empty."""
    keys = [f"p{p}" for p in PERCENTILES] + ["max", "mean"]
    if not values:
        return dict.fromkeys(keys, 0.0)
    ordered = sorted(values)
    out = {}
    for p in PERCENTILES:
        rank = max(1, math.ceil(p / 100 * len(ordered)))
        out[f"p{p}"] = round(1000 * ordered[rank - 1], 3)
    out["max"] = round(1000 * ordered[-1], 3)
    out["mean"] = round(1000 * sum(ordered) / len(ordered), 3)
    return out


class _Run:
    """Shared state of one run: the clock, the measured window and the tallies."""

    def __init__(self, config: LoadConfig, script: WordScript, result: LoadResult) -> None:
        self.config = config
        self.script = script
        self.result = result
        self.metadata: tuple[tuple[str, str], ...] = (
            (("authorization", f"Bearer {config.token}"),) if config.token else ())
        self.all_open = asyncio.Event()
        # Set once start and stop are known; conversations wait on this, not on all_open.
        self.go = asyncio.Event()
        self.opening = config.conversations
        self.start = 0.0  # loop time when sending starts (all conversations open)
        self.stop = 0.0

    def opened_one(self) -> None:
        self.opening -= 1
        if self.opening == 0:
            self.all_open.set()

    def error(self, name: str) -> None:
        self.result.errors[name] += 1

    def answered(self, now: float, sent: float) -> None:
        """A word sent (or due) at ``sent`` got its first hypothesis at ``now`` (loop time)."""
        result = self.result
        result.words_answered += 1
        result.latencies.append(now - sent)
        if now <= self.stop:
            result.answered_in_window += 1


def _channel(config: LoadConfig, index: int) -> grpc.aio.Channel:
    options: list[tuple[str, Any]] = [
        # Separate connections, not one shared subchannel, so streams spread over them.
        ("grpc.use_local_subchannel_pool", 1),
        ("grpc.channel_id", index),
        ("grpc.max_receive_message_length", 64 * 1024 * 1024),
    ]
    if not config.tls:
        return grpc.aio.insecure_channel(config.target, options=options)
    roots = None
    if config.tls_ca is not None:
        try:
            roots = config.tls_ca.read_bytes()
        except OSError as exc:
            raise InputError(f"{config.tls_ca}: cannot read the CA certificates: "
                             f"{exc.strerror}") from None
    credentials = grpc.ssl_channel_credentials(root_certificates=roots)
    return grpc.aio.secure_channel(config.target, credentials, options=options)


async def _feed(run: _Run, stub: pb_grpc.MidstreamStub, number: int) -> None:
    """One simulated conversation: open, send at the rate, close, read everything."""
    config, result = run.config, run.result
    loop = asyncio.get_running_loop()
    pending: dict[str, float] = {}
    call = stub.Feed(metadata=run.metadata)
    opened = False
    reader: asyncio.Task[None] | None = None

    async def read_updates() -> None:
        while True:
            message = await call.read()
            if message is grpc.aio.EOF:
                return
            if message.WhichOneof("body") != "update":
                continue
            now = loop.time()
            for state in message.update.words:
                sent = pending.pop(state.word_id, None)
                if sent is not None:
                    run.answered(now, sent)

    try:
        await call.write(pb.ClientEvent(open=pb.OpenConversation()))
        welcome = await call.read()
        if welcome is grpc.aio.EOF or welcome.WhichOneof("body") != "welcome":
            raise grpc.aio.AioRpcError(grpc.StatusCode.UNKNOWN, grpc.aio.Metadata(),
                                       grpc.aio.Metadata(), details="no welcome")
        opened = True
        result.opened += 1
        run.opened_one()
        reader = asyncio.ensure_future(read_updates())
        await run.go.wait()
        interval = 1 / config.rate
        # A random phase so conversations do not all send in the same millisecond.
        due = run.start + random.Random(config.seed * 100003 + number).random() * interval
        index = 0
        while due < run.stop:
            delay = due - loop.time()
            if delay > 0:
                await asyncio.sleep(delay)
            speaker, text = run.script.word(number, index)
            word_id = f"w{index}"
            event = pb.ClientEvent(words=pb.WordBatch(words=[
                pb.SpokenWord(word_id=word_id, speaker=speaker, text=text)]))
            sent = loop.time()
            result.send_lag.append(max(0.0, sent - due))
            pending[word_id] = sent
            await call.write(event)
            result.words_sent += 1
            index += 1
            due += interval
        await call.write(pb.ClientEvent(close=pb.CloseConversation()))
        await call.done_writing()
        await asyncio.wait_for(reader, timeout=_SETTLE_S)
    except grpc.aio.AioRpcError as exc:
        run.error(exc.code().name)
    except TimeoutError:
        run.error(SETTLE_TIMEOUT)
    finally:
        if reader is not None and not reader.done():
            reader.cancel()
        if not opened:
            run.opened_one()
        call.cancel()


async def _describe(run: _Run, stub: pb_grpc.MidstreamStub, number: int) -> None:
    """The baseline: one trivial unary call per would-be word, at the same rate."""
    config, result = run.config, run.result
    loop = asyncio.get_running_loop()
    result.opened += 1
    run.opened_one()
    await run.go.wait()
    interval = 1 / config.rate
    due = run.start + random.Random(config.seed * 100003 + number).random() * interval
    while due < run.stop:
        delay = due - loop.time()
        if delay > 0:
            await asyncio.sleep(delay)
        sent = loop.time()
        result.send_lag.append(max(0.0, sent - due))
        result.words_sent += 1
        try:
            await stub.DescribeModels(pb.DescribeModelsRequest(), metadata=run.metadata)
        except grpc.aio.AioRpcError as exc:
            run.error(exc.code().name)
        else:
            run.answered(loop.time(), sent)
        due += interval


class _Schedule:
    """When each word of a set of conversations falls due, earliest first.

    A heap of (due time, conversation, word index), so a tick costs O(words due * log n).
    """

    def __init__(self, run: _Run, numbers: Sequence[int]) -> None:
        config = run.config
        self._interval = 1 / config.rate
        self._stop = run.stop
        # The same random phases as the one-stream-per-conversation mode.
        firsts = ((run.start + random.Random(config.seed * 100003 + number).random()
                   * self._interval, number, 0) for number in numbers)
        self._heap = [first for first in firsts if first[0] < self._stop]
        heapq.heapify(self._heap)

    def __bool__(self) -> bool:
        return bool(self._heap)

    def due(self, now: float) -> list[tuple[float, int, int]]:
        """Every (due time, conversation, word index) due by ``now``; schedules the next."""
        heap, out = self._heap, []
        while heap and heap[0][0] <= now:
            due, number, index = heapq.heappop(heap)
            out.append((due, number, index))
            if due + self._interval < self._stop:
                heapq.heappush(heap, (due + self._interval, number, index + 1))
        return out


async def _ticks(run: _Run) -> AsyncIterator[float]:
    """Tick times from the start of sending, every ``tick_s``, without drift, until stop."""
    loop = asyncio.get_running_loop()
    tick = run.start
    while tick < run.stop + run.config.tick_s:
        delay = tick - loop.time()
        if delay > 0:
            await asyncio.sleep(delay)
        yield loop.time()
        tick += run.config.tick_s


async def _multiplexed(run: _Run, stub: pb_grpc.MidstreamStub, numbers: list[int]) -> None:
    """Conversations ``numbers`` over one FeedMany stream: frames of due words per tick."""
    config, result = run.config, run.result
    loop = asyncio.get_running_loop()
    call = stub.FeedMany(metadata=run.metadata)
    # Channel numbers count from 1 in opening order, as the protocol asks.
    channel_of = {number: index + 1 for index, number in enumerate(numbers)}
    unanswered = set(channel_of.values())  # opens not yet answered
    live: set[int] = set()
    pending: dict[tuple[int, str], float] = {}  # (channel, word id) -> scheduled time
    reader: asyncio.Task[None] | None = None

    def answered(channel: int, *, ok: bool) -> None:
        if channel in unanswered:
            unanswered.discard(channel)
            run.opened_one()
            if ok:
                result.opened += 1
                live.add(channel)

    async def read_replies() -> None:
        while True:
            frame = await call.read()
            if frame is grpc.aio.EOF:
                return
            now = loop.time()
            for reply in frame.replies:
                channel = reply.channel
                if reply.WhichOneof("body") == "error":
                    run.error(reply.error.code)
                    answered(channel, ok=False)
                    continue
                message = reply.message
                kind = message.WhichOneof("body")
                if kind == "update":
                    for state in message.update.words:
                        due = pending.pop((channel, state.word_id), None)
                        if due is not None:
                            run.answered(now, due)
                elif kind == "welcome":
                    answered(channel, ok=True)
                elif kind == "ended":
                    live.discard(channel)

    try:
        reader = asyncio.ensure_future(read_replies())
        # Open at the same moments the one-stream-per-conversation mode would, in frames.
        spacing = config.ramp_s / config.conversations
        opening = [(number * spacing, channel_of[number]) for number in numbers]
        began = loop.time()
        while opening:
            now = loop.time() - began
            due_now = [c for at, c in opening if at <= now]
            opening = [(at, c) for at, c in opening if at > now]
            for frame in _frames([
                    pb.ChannelEvent(channel=c, event=pb.ClientEvent(open=pb.OpenConversation()))
                    for c in due_now]):
                await call.write(frame)
            if opening:
                await asyncio.sleep(max(opening[0][0] - (loop.time() - began), config.tick_s))
        await run.go.wait()
        schedule = _Schedule(run, [n for n in numbers if channel_of[n] in live])
        async for now in _ticks(run):
            due_words = schedule.due(now)
            if not due_words:
                if not schedule:
                    break
                continue
            events = []
            for due, number, index in due_words:
                speaker, text = run.script.word(number, index)
                channel, word_id = channel_of[number], f"w{index}"
                pending[(channel, word_id)] = due
                events.append(pb.ChannelEvent(channel=channel, event=pb.ClientEvent(
                    words=pb.WordBatch(words=[
                        pb.SpokenWord(word_id=word_id, speaker=speaker, text=text)]))))
            sent = loop.time()
            result.send_lag.extend(max(0.0, sent - due) for due, _, _ in due_words)
            result.words_sent += len(events)
            for frame in _frames(events):
                await call.write(frame)
        for frame in _frames([
                pb.ChannelEvent(channel=c, event=pb.ClientEvent(close=pb.CloseConversation()))
                for c in sorted(live)]):
            await call.write(frame)
        await call.done_writing()
        try:
            await asyncio.wait_for(reader, timeout=_SETTLE_S)
        except TimeoutError:
            result.errors[SETTLE_TIMEOUT] += max(len(live), 1)
    except grpc.aio.AioRpcError as exc:
        # The stream failed: every conversation still on it failed with it.
        result.errors[exc.code().name] += max(len(live) + len(unanswered), 1)
    finally:
        for channel in list(unanswered):
            answered(channel, ok=False)
        if reader is not None and not reader.done():
            reader.cancel()
        call.cancel()


async def _describe_ticks(run: _Run, stub: pb_grpc.MidstreamStub, numbers: list[int]) -> None:
    """The multiplexed baseline: one DescribeModels call per tick with words due."""
    result = run.result
    loop = asyncio.get_running_loop()
    for _ in numbers:
        result.opened += 1
        run.opened_one()
    await run.go.wait()

    async def one_call(dues: list[float]) -> None:
        sent = loop.time()
        result.send_lag.extend(max(0.0, sent - due) for due in dues)
        result.words_sent += len(dues)
        try:
            await stub.DescribeModels(pb.DescribeModelsRequest(), metadata=run.metadata)
        except grpc.aio.AioRpcError as exc:
            result.errors[exc.code().name] += len(dues)
            return
        now = loop.time()
        for due in dues:
            run.answered(now, due)

    schedule = _Schedule(run, numbers)
    calls: set[asyncio.Task[None]] = set()
    async for now in _ticks(run):
        dues = [due for due, _, _ in schedule.due(now)]
        if dues:
            task = asyncio.ensure_future(one_call(dues))
            calls.add(task)
            task.add_done_callback(calls.discard)
        elif not schedule:
            break
    await asyncio.gather(*calls)


def _frames(events: list[pb.ChannelEvent]) -> list[pb.ClientFrame]:
    """``events`` in order, as frames of at most :data:`MAX_FRAME_EVENTS` (none when empty)."""
    return [pb.ClientFrame(events=events[i:i + MAX_FRAME_EVENTS])
            for i in range(0, len(events), MAX_FRAME_EVENTS)]


async def run_load(config: LoadConfig, script: WordScript, *,
                   probe: ProcessProbe | None = None,
                   lag_probe: MetricsProbe | None = None) -> LoadResult:
    """Run one load test and return its measurements.

    The conversations are opened over ``config.ramp_s`` seconds; sending starts once all are
    open (or failed to open), runs ``config.seconds`` seconds, then every conversation closes
    and waits up to a few seconds for the updates of its last words. ``probe`` samples a local
    server before opening, once all are open and at the end of the sending window;
    ``lag_probe`` reads the server's loop-lag histogram when the window opens and closes (a
    failed read is recorded in the result, not raised: the run's other figures stand).
    """
    result = LoadResult(config=config)
    run = _Run(config, script, result)
    loop = asyncio.get_running_loop()
    channels = [_channel(config, i) for i in range(config.channels)]
    try:
        stubs = [pb_grpc.MidstreamStub(c) for c in channels]  # type: ignore[no-untyped-call]
        result.server_before = probe.sample() if probe is not None else None
        tasks = []
        if config.multiplex:
            streams = _multiplexed if config.workload == "feed" else _describe_ticks
            for index, stub in enumerate(stubs):
                numbers = list(range(index, config.conversations, len(stubs)))
                if numbers:
                    tasks.append(asyncio.ensure_future(streams(run, stub, numbers)))
        else:
            body = _feed if config.workload == "feed" else _describe
            spacing = config.ramp_s / config.conversations
            for number in range(config.conversations):
                tasks.append(asyncio.ensure_future(
                    body(run, stubs[number % len(stubs)], number)))
                if spacing > 0:
                    await asyncio.sleep(spacing)
        try:
            async with asyncio.timeout(config.ramp_s + 30.0):
                await run.all_open.wait()
        except TimeoutError:
            result.errors[OPEN_TIMEOUT] += run.opening
            run.all_open.set()
        result.server_open = probe.sample() if probe is not None else None
        result.steal_open = read_steal()
        if lag_probe is not None:
            result.loop_lag_open = await _read_lag(lag_probe, result)
        cpu = time.process_time()
        run.start = loop.time()
        run.stop = run.start + config.seconds
        run.go.set()
        await asyncio.sleep(config.seconds)
        result.measured_s = loop.time() - run.start
        result.client_cpu_s = time.process_time() - cpu
        result.server_after = probe.sample() if probe is not None else None
        result.steal_after = read_steal()
        if lag_probe is not None and result.loop_lag_error is None:
            result.loop_lag_after = await _read_lag(lag_probe, result)
        await asyncio.gather(*tasks, return_exceptions=False)
    finally:
        for channel in channels:
            await channel.close()
    return result


async def _read_lag(probe: MetricsProbe, result: LoadResult) -> Histogram | None:
    # Off the event loop: the generator's sends must not wait for an HTTP read.
    try:
        return await asyncio.to_thread(probe.read)
    except InputError as exc:
        result.loop_lag_error = str(exc)
        return None


@dataclass(slots=True, kw_only=True)
class HoldResult:
    """Server memory with ``opened`` conversations live and idle, each after a few words."""

    conversations: int
    words_each: int
    opened: int = 0
    errors: Counter[str] = field(default_factory=Counter)
    before: ProcessSample | None = None
    held: ProcessSample | None = None

    def summary(self) -> dict[str, Any]:
        """The figures as JSON-ready values (memory in bytes)."""
        out: dict[str, Any] = {
            "conversations": self.conversations, "words_each": self.words_each,
            "opened": self.opened, "errors": dict(sorted(self.errors.items())),
            "error_count": sum(self.errors.values()),
        }
        if self.before is not None and self.held is not None:
            delta = self.held.rss_bytes - self.before.rss_bytes
            out |= {"rss_before_bytes": self.before.rss_bytes,
                    "rss_held_bytes": self.held.rss_bytes, "rss_delta_bytes": delta,
                    "bytes_per_conversation": round(delta / max(self.opened, 1))}
        return out


async def hold_conversations(config: LoadConfig, script: WordScript, *, words_each: int,
                             probe: ProcessProbe, warm_up: int = 8, settle_s: float = 2.0,
                             bare: bool = False) -> HoldResult:
    """Open ``config.conversations`` conversations, send each a few words, and hold them idle.

    Each conversation sends ``words_each`` words one event at a time, waiting for each word's
    update, then stays open without sending. Once all are idle (and ``settle_s`` seconds more,
    for the server to finish its work) the server's RSS is sampled; then all are closed.
    ``warm_up`` conversations are run to the end first, so allocations made once per server
    (first stream, first decode) are not charged to the measured ones. ``config.rate``,
    ``seconds`` and ``workload`` are not used.

    ``bare=True`` is the transport baseline: each stream is started but sends nothing (no
    ``open``, so no session and no engine exist), measuring what an open gRPC stream and its
    waiting handler cost. The server's ``idle_timeout_s`` must outlast the hold.
    """
    result = HoldResult(conversations=config.conversations, words_each=words_each)
    channels = [_channel(config, i) for i in range(config.channels)]
    metadata: tuple[tuple[str, str], ...] = (
        (("authorization", f"Bearer {config.token}"),) if config.token else ())
    release = asyncio.Event()
    idle = 0
    all_idle = asyncio.Event()

    async def one(stub: pb_grpc.MidstreamStub, number: int, *, hold: bool) -> None:
        nonlocal idle
        call = stub.Feed(metadata=metadata)
        counted = False
        try:
            if bare and hold:
                await call.wait_for_connection()
                result.opened += 1
                idle += 1
                counted = True
                if idle == config.conversations:
                    all_idle.set()
                await release.wait()
                return
            await call.write(pb.ClientEvent(open=pb.OpenConversation()))
            welcome = await call.read()
            if welcome is grpc.aio.EOF or welcome.WhichOneof("body") != "welcome":
                raise grpc.aio.AioRpcError(grpc.StatusCode.UNKNOWN, grpc.aio.Metadata(),
                                           grpc.aio.Metadata(), details="no welcome")
            if hold:
                result.opened += 1
            for index in range(words_each):
                speaker, text = script.word(number, index)
                await call.write(pb.ClientEvent(words=pb.WordBatch(words=[
                    pb.SpokenWord(word_id=f"w{index}", speaker=speaker, text=text)])))
                message = await call.read()
                if message is grpc.aio.EOF:
                    raise grpc.aio.AioRpcError(grpc.StatusCode.UNKNOWN, grpc.aio.Metadata(),
                                               grpc.aio.Metadata(), details="stream ended")
            if hold:
                idle += 1
                counted = True
                if idle == config.conversations:
                    all_idle.set()
                await release.wait()
            await call.write(pb.ClientEvent(close=pb.CloseConversation()))
            await call.done_writing()
            while await call.read() is not grpc.aio.EOF:
                pass
        except grpc.aio.AioRpcError as exc:
            if hold:
                result.errors[exc.code().name] += 1
        finally:
            if hold and not counted:
                idle += 1
                if idle == config.conversations:
                    all_idle.set()
            call.cancel()

    try:
        stubs = [pb_grpc.MidstreamStub(c) for c in channels]  # type: ignore[no-untyped-call]
        await asyncio.gather(*(one(stubs[0], -1 - i, hold=False) for i in range(warm_up)))
        await asyncio.sleep(settle_s)
        result.before = probe.sample()
        spacing = config.ramp_s / config.conversations
        tasks = []
        for number in range(config.conversations):
            tasks.append(asyncio.ensure_future(one(stubs[number % len(stubs)], number,
                                                   hold=True)))
            if spacing > 0:
                await asyncio.sleep(spacing)
        try:
            async with asyncio.timeout(config.ramp_s + 60.0):
                await all_idle.wait()
        except TimeoutError:
            result.errors[OPEN_TIMEOUT] += config.conversations - idle
        await asyncio.sleep(settle_s)
        result.held = probe.sample()
        release.set()
        await asyncio.gather(*tasks)
    finally:
        for channel in channels:
            await channel.close()
    return result
