"""A server's event-loop lag over a load run, read from its Prometheus endpoint.

A late word can be late because the server's loop was busy (its core saturated, a collector
pause, the hypervisor holding the core) or because of the transport and the load generator.
``midstream serve --metrics-port`` exports ``midstream_loop_lag_seconds``, a histogram of how late
the loop ran a callback due every 0.1 s; the counts at the start and the end of the sending
window give that window's lag alone. A histogram says which bucket a percentile fell in, not its
value, so percentiles are reported as bucket ranges (``(0.01, 0.02]`` s reads "between 10 and
20 ms").

:func:`parse_histogram` reads the Prometheus text exposition format (version 0.0.4, the format
``prometheus_client`` serves); :class:`MetricsProbe` fetches it over HTTP.
"""

from __future__ import annotations

import math
import urllib.error
import urllib.request
from dataclasses import dataclass

from midstream import InputError

__all__ = ["LOOP_LAG_METRIC", "Histogram", "MetricsProbe", "parse_histogram"]

#: The server's loop-lag histogram (see midstream.server._metrics).
LOOP_LAG_METRIC = "midstream_loop_lag_seconds"
#: Seconds one metrics read may take; it runs only at the window's start and end.
_READ_TIMEOUT_S = 5.0
#: Bytes read from a metrics page at most (the server's is a few KiB).
_MAX_PAGE_BYTES = 4 * 2**20


@dataclass(frozen=True, slots=True)
class Histogram:
    """Cumulative counts of a Prometheus histogram: ``counts[i]`` observations were at most
    ``bounds[i]`` seconds; the last bound is ``inf``."""

    bounds: tuple[float, ...]
    counts: tuple[int, ...]

    @property
    def total(self) -> int:
        return self.counts[-1] if self.counts else 0

    def since(self, earlier: Histogram) -> Histogram:
        """The observations made after ``earlier`` was read (same metric, same buckets).

        Raises
        ------
        InputError
            The buckets differ, or a count went down (the server restarted in between).
        """
        if earlier.bounds != self.bounds:
            raise InputError("the histogram's buckets changed between two reads")
        counts = tuple(b - a for a, b in zip(earlier.counts, self.counts, strict=True))
        if any(c < 0 for c in counts):
            raise InputError("a histogram count went down between two reads (did the server "
                             "restart?)")
        return Histogram(self.bounds, counts)

    def bucket_of(self, quantile: float) -> tuple[float, float] | None:
        """The ``(lower, upper]`` bounds of the bucket holding the ``quantile`` (0 < q <= 1)
        observation; ``upper`` is ``inf`` past the last finite bound. None with no
        observations."""
        total = self.total
        if total == 0:
            return None
        rank = math.ceil(quantile * total)
        lower = 0.0
        for bound, count in zip(self.bounds, self.counts, strict=True):
            if count >= rank:
                return (lower, bound)
            lower = bound
        return (lower, math.inf)  # unreachable when the +Inf bucket holds the total


def parse_histogram(text: str, name: str) -> Histogram | None:
    """The cumulative buckets of histogram ``name`` in a Prometheus text page, or None when the
    page has no such histogram.

    Reads only ``<name>_bucket{le="..."} <count>`` lines with no other label.

    Raises
    ------
    InputError
        A bucket line of ``name`` that is not ``le="<number>"`` and a count.

    Examples
    --------
    >>> page = '''# TYPE lag histogram
    ... lag_bucket{le="0.01"} 3.0
    ... lag_bucket{le="+Inf"} 4.0
    ... lag_count 4.0'''
    >>> parse_histogram(page, "lag")
    Histogram(bounds=(0.01, inf), counts=(3, 4))
    """
    prefix = name + '_bucket{le="'
    buckets: list[tuple[float, int]] = []
    for line in text.splitlines():
        if not line.startswith(prefix):
            continue
        bound_text, sep, rest = line[len(prefix):].partition('"}')
        fields = rest.split()
        try:
            if not sep or not fields:
                raise ValueError(line)
            buckets.append((float(bound_text), int(float(fields[0]))))
        except ValueError:
            raise InputError(f"metrics page: cannot read the bucket line {line[:120]!r}"
                             ) from None
    if not buckets:
        return None
    buckets.sort()
    return Histogram(tuple(b for b, _ in buckets), tuple(c for _, c in buckets))


class MetricsProbe:
    """Reads the loop-lag histogram of a server's metrics endpoint (``http://HOST:PORT/...``).

    Parameters
    ----------
    url
        The metrics page, as ``midstream serve`` prints it (``metrics on <url>``).
    """

    def __init__(self, url: str) -> None:
        if not url.startswith(("http://", "https://")):
            raise InputError(f"metrics address {url!r}: give an http:// or https:// URL")
        self.url = url

    def read(self) -> Histogram:
        """The loop-lag histogram now. Blocking: run it off the event loop.

        Raises
        ------
        InputError
            The page cannot be read or has no ``midstream_loop_lag_seconds`` histogram.
        """
        try:
            with urllib.request.urlopen(self.url, timeout=_READ_TIMEOUT_S) as response:
                text = response.read(_MAX_PAGE_BYTES).decode("utf-8", "replace")
        except (urllib.error.URLError, OSError, ValueError) as exc:
            reason = getattr(exc, "reason", None) or exc
            raise InputError(f"metrics at {self.url}: cannot read ({reason})") from None
        histogram = parse_histogram(text, LOOP_LAG_METRIC)
        if histogram is None:
            raise InputError(f"metrics at {self.url}: no {LOOP_LAG_METRIC} histogram (is it "
                             f"a Midstream server's metrics page?)")
        return histogram
