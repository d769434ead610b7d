"""Prometheus metrics of one server, in a registry that server owns (no module-level state).

Names and meanings (documented in ``docs/service.md``):

``midstream_words_total``
    Words taken in by ``Feed`` (rate it for words per second).
``midstream_update_latency_seconds``
    From reading an event off the stream to having its update built and queued for everyone.
``midstream_loop_lag_seconds``
    How late the server's event loop ran a callback due every 0.1 s. Every event of every
    conversation waits its turn on that one loop, so a lag near the update latency budget says
    the server's core is saturated (or was taken away: a virtual machine's steal time shows
    here too); a low lag with high client-side latency points at the network or the caller.
``midstream_live_conversations``
    Conversations being ingested now.
``midstream_revisions_total``
    Published word and utterance states whose revision count went up (a label or confidence
    changed); a state turning final without changing is not counted.
``midstream_errors_total{code}``
    RPCs ended with a non-OK status, by gRPC status code name.

Safe to use from the event loop thread only (the HTTP exporter thread only reads).
"""

from __future__ import annotations

import asyncio
import bisect
import threading
from collections.abc import Iterator
from wsgiref.simple_server import WSGIServer

from prometheus_client import CollectorRegistry, Counter, Gauge, start_http_server
from prometheus_client.core import CounterMetricFamily, HistogramMetricFamily
from prometheus_client.registry import Collector

# Per-word work is sub-millisecond; network and queuing push the tail into tens of ms.
_LATENCY_BUCKETS = (0.0005, 0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.25, 0.5, 1.0)
# A callback of an idle loop runs well within a millisecond of its time; a frame of many words
# holds the loop for milliseconds, a stall for hundreds.
_LAG_BUCKETS = (0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5)
#: Seconds between two loop-lag probes (common practice, no source: often enough to catch a
#: stall of a latency budget's size, rare enough to cost nothing).
LOOP_LAG_INTERVAL_S = 0.1


class ServerMetrics:
    """The counters of one server and, once :meth:`serve` is called, their HTTP exporter."""

    def __init__(self) -> None:
        self.registry = CollectorRegistry(auto_describe=True)
        self.tally = WordTally()
        self.registry.register(self.tally)
        self.live = Gauge(
            "midstream_live_conversations", "Conversations being ingested.",
            registry=self.registry,
        )
        self.errors = Counter(
            "midstream_errors", "RPCs ended with a non-OK status.", ["code"],
            registry=self.registry,
        )
        self._http: tuple[WSGIServer, threading.Thread] | None = None

    def serve(self, host: str, port: int) -> int:
        """Start the HTTP exporter on ``host:port`` (0 picks a port); returns the port."""
        server, thread = start_http_server(port, addr=host, registry=self.registry)
        self._http = (server, thread)
        return int(server.server_address[1])

    def close(self) -> None:
        """Stop the HTTP exporter if it runs; idempotent."""
        if self._http is not None:
            server, thread = self._http
            self._http = None
            server.shutdown()
            server.server_close()
            thread.join(timeout=5)


class _Buckets:
    """A histogram's bucket counts and sum as plain numbers (see :class:`WordTally`)."""

    __slots__ = ("bounds", "counts", "total")

    def __init__(self, bounds: tuple[float, ...]) -> None:
        self.bounds = bounds
        # One count per bound, then the overflow (+Inf) count.
        self.counts = [0] * (len(bounds) + 1)
        self.total = 0.0

    def observe(self, value: float) -> None:
        # bisect_left: a value equal to a bound belongs to that bound's bucket (le="bound").
        self.counts[bisect.bisect_left(self.bounds, value)] += 1
        self.total += value

    def family(self, name: str, documentation: str) -> HistogramMetricFamily:
        counts = list(self.counts)  # one atomic copy: the buckets agree with each other
        cumulative, running = [], 0
        for bound, count in zip((*map(str, self.bounds), "+Inf"), counts, strict=True):
            running += count
            cumulative.append((bound, running))
        return HistogramMetricFamily(name, documentation, buckets=cumulative,
                                     sum_value=self.total)


class WordTally(Collector):
    """The per-word counters: words, revisions, the update-latency and loop-lag histograms.

    Every word adds to these, so they are plain numbers the event loop thread adds to without a
    lock (prometheus_client's own metrics take a lock on every call: four per word, a few
    per cent of the server's CPU at full load). The exporter thread reads them when scraped;
    a scrape racing an update may miss that one update's share, never a count already made.
    """

    def __init__(self) -> None:
        self.words = 0
        self.revisions = 0
        self._latency = _Buckets(_LATENCY_BUCKETS)
        self._loop_lag = _Buckets(_LAG_BUCKETS)
        # Bound once: called for every published update.
        self.observe_latency = self._latency.observe
        self.observe_loop_lag = self._loop_lag.observe

    def describe(self) -> Iterator[CounterMetricFamily | HistogramMetricFamily]:
        return self.collect()

    def collect(self) -> Iterator[CounterMetricFamily | HistogramMetricFamily]:
        yield CounterMetricFamily("midstream_words", "Words taken in by Feed.",
                                  value=self.words)
        yield self._latency.family(
            "midstream_update_latency_seconds",
            "Seconds from reading an event to its update being published.")
        yield self._loop_lag.family(
            "midstream_loop_lag_seconds",
            "Seconds the event loop ran a periodic callback late.")
        yield CounterMetricFamily("midstream_revisions",
                                  "Published states that revised an earlier one.",
                                  value=self.revisions)


class LoopLagProbe:
    """Times how late the running loop calls back every ``interval`` seconds.

    A timer callback, not a task: nothing to await or cancel mid-step. :meth:`start` arms it on
    the running loop, :meth:`stop` disarms it; both are idempotent.
    """

    def __init__(self, tally: WordTally, interval: float = LOOP_LAG_INTERVAL_S) -> None:
        self._observe = tally.observe_loop_lag
        self._interval = interval
        self._loop: asyncio.AbstractEventLoop | None = None
        self._handle: asyncio.TimerHandle | None = None
        self._due = 0.0

    def start(self) -> None:
        """Arm the probe on the running loop."""
        if self._handle is None:
            self._loop = asyncio.get_running_loop()
            self._arm()

    def stop(self) -> None:
        """Disarm the probe."""
        if self._handle is not None:
            self._handle.cancel()
            self._handle = None

    def _arm(self) -> None:
        assert self._loop is not None
        self._due = self._loop.time() + self._interval
        self._handle = self._loop.call_at(self._due, self._tick)

    def _tick(self) -> None:
        assert self._loop is not None
        self._observe(max(0.0, self._loop.time() - self._due))
        self._arm()
