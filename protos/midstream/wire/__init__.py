"""Code generated from ``midstream.proto`` by ``scripts/gen_protos.py``; never edited by hand.

Only ``midstream.server`` and ``midstream.client`` import these modules: they convert the
messages to and from the domain types at the network edge.
"""

__all__: list[str] = []
