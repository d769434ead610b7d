"""The load generator behind ``midstream bench``: many conversations at a steady word rate,
latency per word, and the server's own CPU read from its metrics and ``/proc``.

Kept apart from the client library (it drives the wire directly to measure the server, not the
client) and from the command line, which only parses options and prints its report.
"""
