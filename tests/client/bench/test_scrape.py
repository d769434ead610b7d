"""Reading a server's loop-lag histogram for the load generator (midstream.client.bench._scrape)."""

from __future__ import annotations

import math
import re

import pytest
from midstream import InputError
from midstream.client.bench._scrape import (
    LOOP_LAG_METRIC,
    Histogram,
    MetricsProbe,
    parse_histogram,
)
from midstream.server._metrics import _LAG_BUCKETS
from prometheus_client import CollectorRegistry, generate_latest
from prometheus_client import Histogram as ReferenceHistogram

_LAGS = [0.0005] * 98 + [0.03, 0.3]


def _page(values: list[float]) -> str:
    # Reference: prometheus_client's own text exposition of a histogram with the server's
    # buckets, fed known values; the parser must read back the counts it wrote.
    registry = CollectorRegistry()
    histogram = ReferenceHistogram(LOOP_LAG_METRIC, "lag", buckets=_LAG_BUCKETS,
                                   registry=registry)
    for value in values:
        histogram.observe(value)
    return generate_latest(registry).decode()


def test_parses_what_prometheus_client_writes() -> None:
    histogram = parse_histogram(_page(_LAGS), LOOP_LAG_METRIC)
    assert histogram is not None
    assert histogram.bounds == (*_LAG_BUCKETS, math.inf)
    assert histogram.total == 100
    # Cumulative: 98 at or under 1 ms, 99 at or under 50 ms, all 100 at or under 0.5 s.
    counts = dict(zip(histogram.bounds, histogram.counts, strict=True))
    assert counts[0.001] == 98 and counts[0.02] == 98 and counts[0.05] == 99
    assert counts[0.25] == 99 and counts[0.5] == 100


def test_percentile_buckets() -> None:
    histogram = parse_histogram(_page(_LAGS), LOOP_LAG_METRIC)
    assert histogram is not None
    # Ranks by the nearest-rank definition: the 50th and 99th of 100 sorted values.
    assert histogram.bucket_of(0.5) == (0.0, 0.001)
    assert histogram.bucket_of(0.99) == (0.02, 0.05)
    assert histogram.bucket_of(1.0) == (0.25, 0.5)


def test_a_lag_past_the_last_bucket_has_no_upper_bound() -> None:
    histogram = parse_histogram(_page([4.0]), LOOP_LAG_METRIC)
    assert histogram is not None
    assert histogram.bucket_of(1.0) == (_LAG_BUCKETS[-1], math.inf)


def test_window_is_the_difference_of_two_reads() -> None:
    before = parse_histogram(_page(_LAGS[:50]), LOOP_LAG_METRIC)
    after = parse_histogram(_page(_LAGS), LOOP_LAG_METRIC)
    assert before is not None and after is not None
    window = after.since(before)
    # The window holds the last 50 values: 48 small ones, 0.03 and 0.3.
    assert window.total == 50
    assert window.bucket_of(1.0) == (0.25, 0.5)
    assert Histogram(window.bounds, (0,) * len(window.bounds)).bucket_of(0.99) is None


def test_a_restarted_server_is_named_not_read_as_negative_counts() -> None:
    before = parse_histogram(_page(_LAGS), LOOP_LAG_METRIC)
    after = parse_histogram(_page(_LAGS[:10]), LOOP_LAG_METRIC)
    assert before is not None and after is not None
    with pytest.raises(InputError, match="restart"):
        after.since(before)


def test_pages_without_the_histogram_or_with_a_bad_line() -> None:
    assert parse_histogram("# nothing here\nother_total 3.0\n", LOOP_LAG_METRIC) is None
    with pytest.raises(InputError, match="bucket line"):
        parse_histogram(f'{LOOP_LAG_METRIC}_bucket{{le="0.1"}} many\n', LOOP_LAG_METRIC)


def test_probe_names_a_bad_address() -> None:
    with pytest.raises(InputError, match="http://"):
        MetricsProbe("127.0.0.1:9464")
    # Port 9 (discard) has nothing listening on loopback: the read fails, naming the URL.
    with pytest.raises(InputError, match=re.escape("127.0.0.1:9/metrics")):
        MetricsProbe("http://127.0.0.1:9/metrics").read()
