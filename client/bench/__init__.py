"""The benchmark harness behind ``midstream bench``.

The load generator (``_load``, with ``_scrape`` reading a server's metrics page and
``_scale_out`` the workers sweep) is the command's default run; every other benchmark is one
module here with a ``register`` that adds its ``midstream bench`` subcommand (listed in
:data:`BENCHMARKS`). ``_kit`` is what they share: where the models and corpora are, the
machine's description, pinning to a core, pairing a figure with its in-run baseline. They are
the command line's, so they print; each also writes its figures as JSON (``--json``).

The micro-benchmarks time the models' and the server's inner stages through the public hooks
those packages keep for it (:mod:`midstream.models.probes`, :mod:`midstream.server.probes`,
:mod:`midstream.corpora.probes`), so the timed code is the served code.
"""

#: The benchmark modules, in the order ``midstream bench --help`` lists them.
BENCHMARKS: tuple[str, ...] = (
    "midstream.client.bench._decoder",
    "midstream.client.bench._functions",
    "midstream.client.bench._read",
    "midstream.client.bench._ingest",
    "midstream.client.bench._gc",
    "midstream.client.bench._memory",
    "midstream.client.bench._kept",
    "midstream.client.bench._redis",
    "midstream.client.bench._service",
    "midstream.client.bench._soak",
    "midstream.client.bench._report",
)
