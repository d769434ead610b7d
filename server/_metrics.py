"""Prometheus metrics of one server, in a registry that server owns (no module-level state).

Names and meanings (documented in ``docs/service.md``):

``midstream_words_total``
    Words taken in by ``Converse`` (rate it for words per second).
``midstream_update_latency_seconds``
    From reading an event off the stream to having its update built and queued for everyone.
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

import bisect
import threading
from collections.abc import Iterator
from wsgiref.simple_server import WSGIServer

from prometheus_client import CollectorRegistry, Counter, Gauge, start_http_server
from prometheus_client.core import CounterMetricFamily, HistogramMetricFamily
from prometheus_client.registry import Collector

# Per-word work is sub-millisecond; network and queuing push the tail into tens of ms.
_LATENCY_BUCKETS = (0.0005, 0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.25, 0.5, 1.0)


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


class WordTally(Collector):
    """The per-word counters: words, revisions and the update-latency histogram.

    Every word adds to these, so they are plain numbers the event loop thread adds to without a
    lock (prometheus_client's own metrics take a lock on every call: four per word, a few
    per cent of the server's CPU at full load). The exporter thread reads them when scraped;
    a scrape racing an update may miss that one update's share, never a count already made.
    """

    def __init__(self) -> None:
        self.words = 0
        self.revisions = 0
        self.latency_sum = 0.0
        # One count per bucket of _LATENCY_BUCKETS, then the overflow (+Inf) count.
        self._latency_counts = [0] * (len(_LATENCY_BUCKETS) + 1)

    def observe_latency(self, seconds: float) -> None:
        """Count one update published ``seconds`` after its event was read."""
        # bisect_left: a value equal to a bound belongs to that bound's bucket (le="bound").
        self._latency_counts[bisect.bisect_left(_LATENCY_BUCKETS, seconds)] += 1
        self.latency_sum += seconds

    def describe(self) -> Iterator[CounterMetricFamily | HistogramMetricFamily]:
        return self.collect()

    def collect(self) -> Iterator[CounterMetricFamily | HistogramMetricFamily]:
        counts = list(self._latency_counts)  # one atomic copy: the buckets agree with each other
        cumulative, running = [], 0
        for bound, count in zip((*map(str, _LATENCY_BUCKETS), "+Inf"), counts, strict=True):
            running += count
            cumulative.append((bound, running))
        yield CounterMetricFamily("midstream_words", "Words taken in by Converse.",
                                  value=self.words)
        yield HistogramMetricFamily(
            "midstream_update_latency_seconds",
            "Seconds from reading an event to its update being published.",
            buckets=cumulative, sum_value=self.latency_sum)
        yield CounterMetricFamily("midstream_revisions",
                                  "Published states that revised an earlier one.",
                                  value=self.revisions)
