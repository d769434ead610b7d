"""The gRPC service that adapts Midstream's models to the network.

:class:`MidstreamServer` owns one grpc.aio server (with health, reflection and optional
Prometheus metrics) configured by :class:`ServerConfig` and its explicit :class:`ServerLimits`;
:func:`status_code` is the one mapping from Midstream errors to gRPC status codes;
:func:`run_server_loop` runs a server coroutine on the fastest event loop installed;
:class:`SharedLogConfig` makes the server one replica of several sharing a Redis log;
:class:`IdleSpinners` keeps the server's cores from idling (``midstream serve --spin-idle-cores``).
"""

from midstream.server._app import MidstreamServer
from midstream.server._config import ServerConfig, ServerLimits, SharedLogConfig
from midstream.server._loop import run_server_loop
from midstream.server._spin import IdleSpinners
from midstream.server._status import status_code

__all__ = ["IdleSpinners", "MidstreamServer", "ServerConfig", "ServerLimits", "SharedLogConfig",
           "run_server_loop", "status_code"]
