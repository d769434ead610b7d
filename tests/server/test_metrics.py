"""Prometheus metrics: served over HTTP from the server's own registry."""

from __future__ import annotations

import asyncio
import time
import urllib.request

import grpc
import pytest
from midstream.server._metrics import _LAG_BUCKETS, _LATENCY_BUCKETS, LoopLagProbe, WordTally
from prometheus_client import CollectorRegistry, Counter, Histogram
from prometheus_client.parser import text_string_to_metric_families
from server_kit import (  # noqa: F401 - fixtures are found by name
    Caller,
    ServerFactory,
    bundle_fixture,
    models_dir_fixture,
    spoken,
    start_server_fixture,
    words_event,
)


def _scrape(port: int) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    with urllib.request.urlopen(f"http://127.0.0.1:{port}/metrics", timeout=5) as reply:
        text = reply.read().decode()
    return {(s.name, tuple(sorted(s.labels.items()))): s.value
            for family in text_string_to_metric_families(text) for s in family.samples}


async def test_metrics_count_words_latency_revisions_live_and_errors(
    start_server: ServerFactory,
) -> None:
    running = await start_server(metrics_port=0)
    port = running.server.metrics_port
    assert port
    caller = Caller(running.stub)
    await caller.open()
    await caller.send(words_event(spoken("w1", "we", start=0.0), spoken("w2", "we", start=1.0)))
    await caller.send(words_event(spoken("w3", "went", start=2.0)))
    during = await asyncio.to_thread(_scrape, port)
    assert during[("midstream_words_total", ())] == 3
    assert during[("midstream_live_conversations", ())] == 1
    assert during[("midstream_update_latency_seconds_count", ())] == 2
    revised, last = 0, dict[tuple[str, str], int]()
    for update in caller.updates:
        for key, revision in [*((("w", w.word_id), w.revision) for w in update.words),
                              *((("u", x.utterance_id), x.revision) for x in update.utterances)]:
            revised += revision > last.get(key, 0)
            last[key] = revision
    assert during[("midstream_revisions_total", ())] == revised
    await caller.call.write(words_event(spoken("w4", "")))
    with pytest.raises(grpc.aio.AioRpcError):
        while True:
            await caller.call.read()
    after = await asyncio.to_thread(_scrape, port)
    assert after[("midstream_live_conversations", ())] == 0
    assert after[("midstream_errors_total", (("code", "INVALID_ARGUMENT"),))] == 1


async def test_two_servers_keep_separate_counts(start_server: ServerFactory) -> None:
    first = await start_server(metrics_port=0)
    second = await start_server(metrics_port=0)
    caller = Caller(first.stub)
    await caller.open()
    await caller.send(words_event(spoken("w1", "so")))
    assert first.server.metrics_port and second.server.metrics_port
    assert (await asyncio.to_thread(_scrape, first.server.metrics_port))[
        ("midstream_words_total", ())] == 1
    assert (await asyncio.to_thread(_scrape, second.server.metrics_port))[
        ("midstream_words_total", ())] == 0


def test_word_tally_exposes_what_prometheus_clients_own_metrics_would() -> None:
    # Reference: prometheus_client's Counter and Histogram, fed the same values, give the
    # samples the lock-free tally must give (bucket bounds inclusive, cumulative, +Inf, sum).
    reference = CollectorRegistry()
    words = Counter("midstream_words", "w", registry=reference)
    revisions = Counter("midstream_revisions", "r", registry=reference)
    latency = Histogram("midstream_update_latency_seconds", "l", buckets=_LATENCY_BUCKETS,
                        registry=reference)
    lag = Histogram("midstream_loop_lag_seconds", "g", buckets=_LAG_BUCKETS,
                    registry=reference)
    tally = WordTally()
    ours = CollectorRegistry()
    ours.register(tally)
    for seconds in (0.0, 0.0005, 0.00051, 0.003, 0.05, 0.7, 1.0, 3.5):
        latency.observe(seconds)
        tally.observe_latency(seconds)
        lag.observe(seconds / 2)
        tally.observe_loop_lag(seconds / 2)
    words.inc(7)
    tally.words += 7
    revisions.inc(2)
    tally.revisions += 2

    def samples(registry: CollectorRegistry) -> dict[tuple[str, tuple[tuple[str, str], ...]],
                                                      float]:
        return {(s.name, tuple(sorted(s.labels.items()))): s.value
                for family in registry.collect() for s in family.samples
                if not s.name.endswith("_created")}

    assert samples(ours) == pytest.approx(samples(reference))


async def test_loop_lag_probe_sees_a_blocked_loop() -> None:
    # The probe's callback runs late by however long the loop was held: a 0.3 s block (the
    # way a long synchronous step holds every conversation) is seen as one lag above 0.25 s.
    # Only lower bounds: a busy test machine can only add lag.
    tally = WordTally()
    probe = LoopLagProbe(tally, interval=0.01)
    probe.start()
    await asyncio.sleep(0.1)
    time.sleep(0.3)  # blocking the loop is the point
    await asyncio.sleep(0.05)
    probe.stop()
    family = next(f for f in tally.collect() if f.name == "midstream_loop_lag_seconds")
    buckets = {s.labels["le"]: s.value for s in family.samples if s.name.endswith("_bucket")}
    total = buckets["+Inf"]
    assert total >= 5  # about ten probes in 0.15 s of free loop
    assert total - buckets["0.25"] >= 1
    total_lag = next(s.value for s in family.samples if s.name.endswith("_sum"))
    assert total_lag >= 0.28
    count = total
    await asyncio.sleep(0.05)  # stopped: no more observations
    family = next(f for f in tally.collect() if f.name == "midstream_loop_lag_seconds")
    assert next(s.value for s in family.samples if s.name.endswith("_count")) == count


async def test_served_metrics_include_loop_lag(start_server: ServerFactory) -> None:
    running = await start_server(metrics_port=0)
    assert running.server.metrics_port
    await asyncio.sleep(0.25)  # two or more probes at the default interval
    scraped = await asyncio.to_thread(_scrape, running.server.metrics_port)
    assert scraped[("midstream_loop_lag_seconds_count", ())] >= 1
