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

import threading
from wsgiref.simple_server import WSGIServer

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, start_http_server

# Per-word work is sub-millisecond; network and queuing push the tail into tens of ms.
_LATENCY_BUCKETS = (0.0005, 0.001, 0.002, 0.005, 0.01, 0.02, 0.05, 0.1, 0.25, 0.5, 1.0)


class ServerMetrics:
    """The counters of one server and, once :meth:`serve` is called, their HTTP exporter."""

    def __init__(self) -> None:
        self.registry = CollectorRegistry(auto_describe=True)
        self.words = Counter(
            "midstream_words", "Words taken in by Converse.", registry=self.registry
        )
        self.latency = Histogram(
            "midstream_update_latency_seconds",
            "Seconds from reading an event to its update being published.",
            buckets=_LATENCY_BUCKETS, registry=self.registry,
        )
        self.live = Gauge(
            "midstream_live_conversations", "Conversations being ingested.",
            registry=self.registry,
        )
        self.revisions = Counter(
            "midstream_revisions", "Published states that revised an earlier one.",
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
