"""The owned server object: ``start()`` / ``stop(grace)`` around one grpc.aio server.

Lifecycle::

    server = MidstreamServer(ServerConfig(port=0))
    await server.start()          # loads models, binds, serves; health SERVING
    ...
    await server.stop(grace=5)    # drain: NOT_SERVING, finish every live conversation,
                                  # deliver final updates and `ended`, then close

``stop`` is idempotent. Constructing the object opens nothing. Use from one event loop.
"""

from __future__ import annotations

import asyncio
import functools
import logging
from types import TracebackType
from typing import TYPE_CHECKING

import grpc
from grpc_health.v1 import health, health_pb2, health_pb2_grpc
from grpc_reflection.v1alpha import reflection
from midstream import EndReason, InputError, UnavailableError, build_name, compiled_modules
from midstream.server._auth import BearerTokenInterceptor
from midstream.server._config import ServerConfig
from midstream.server._decode import add_servicer
from midstream.server._metrics import LoopLagProbe, ServerMetrics
from midstream.server._models import Bundle, load_bundle, tune_bundle
from midstream.server._servicer import MidstreamServicer
from midstream.wire import midstream_pb2 as pb

if TYPE_CHECKING:  # imported only with a shared log: redis stays out of the default path
    from midstream.server._journal import SharedLog

_log = logging.getLogger(__name__)

#: The full name of the service, as health checks and reflection list it.
SERVICE_NAME: str = pb.DESCRIPTOR.services_by_name["Midstream"].full_name


class MidstreamServer:
    """One Midstream gRPC server with its health, reflection and metrics services.

    Parameters
    ----------
    config
        Where to listen and the limits.
    bundle
        Models to serve; ``None`` loads ``config.models_dir`` (or the shipped models) in
        :meth:`start`. Either way ``config.max_open_words``, ``config.settle`` and
        ``config.setting`` apply, also to models loaded later by ``ReloadModels``.
    """

    def __init__(self, config: ServerConfig, *, bundle: Bundle | None = None) -> None:
        self.config = config
        self._bundle = bundle
        self.metrics = ServerMetrics()
        self._loop_lag = LoopLagProbe(self.metrics.tally)
        self._server: grpc.aio.Server | None = None
        self._servicer: MidstreamServicer | None = None
        self._health: health.aio.HealthServicer | None = None
        self._port: int | None = None
        self._metrics_port: int | None = None
        self._stopped = False
        self._shared: SharedLog | None = None
        self._health_tasks: set[asyncio.Task[None]] = set()

    @property
    def port(self) -> int:
        """The bound gRPC port (the real one when configured as 0)."""
        if self._port is None:
            raise UnavailableError("the server has not been started")
        return self._port

    @property
    def metrics_port(self) -> int | None:
        """The bound metrics HTTP port, or ``None`` when metrics are not served."""
        return self._metrics_port

    @property
    def servicer(self) -> MidstreamServicer:
        if self._servicer is None:
            raise UnavailableError("the server has not been started")
        return self._servicer

    def _credentials(self) -> grpc.ServerCredentials | None:
        cert, key = self.config.tls_cert, self.config.tls_key
        if (cert is None) != (key is None):
            raise InputError("TLS needs both a certificate (--tls-cert) and a key (--tls-key)")
        if cert is None or key is None:
            if self.config.require_tls:
                raise InputError("TLS is required (--require-tls) but no --tls-cert/--tls-key "
                                 "were given; refusing to start without TLS")
            return None
        try:
            return grpc.ssl_server_credentials([(key.read_bytes(), cert.read_bytes())])
        except OSError as exc:
            raise InputError(f"cannot read the TLS certificate or key: {exc}") from exc

    async def start(self) -> None:
        """Load the models (unless given), bind and start serving.

        Raises
        ------
        InputError
            Inconsistent TLS settings, TLS required but not configured, decoder settings or a
            conversation setting for a given bundle that is not a ``ModelBundle``, or a
            conversation setting the models have not learnt (the message names those they
            have).
        ModelError
            When the models cannot be loaded.
        UnavailableError
            When the address cannot be bound.
        """
        if self._server is not None:
            raise UnavailableError("the server was already started")
        credentials = self._credentials()
        config = self.config
        load = functools.partial(load_bundle, max_open_words=config.max_open_words,
                                 settle=config.settle, setting=config.setting)
        bundle = self._bundle
        if bundle is None:
            bundle = await asyncio.to_thread(load, config.models_dir)
        else:
            bundle = tune_bundle(bundle, max_open_words=config.max_open_words,
                                 settle=config.settle, setting=config.setting)
        setting = _setting_of(bundle)
        limits = self.config.limits
        interceptors = []
        if self.config.token:
            interceptors.append(BearerTokenInterceptor(self.config.token, self.metrics))
        server = grpc.aio.server(
            interceptors=interceptors,
            options=[
                ("grpc.max_receive_message_length", limits.max_message_bytes),
                ("grpc.max_send_message_length", limits.max_message_bytes),
                # Two servers on one port split the traffic between them: only on purpose
                # (serve --workers, replicas sharing one log).
                ("grpc.so_reuseport", 1 if config.reuse_port else 0),
                # Ping idle connections so a peer that vanished without closing (a dead network)
                # is noticed within about 80 s, before the idle timeout (common practice, no
                # source).
                ("grpc.keepalive_time_ms", 60_000),
                ("grpc.keepalive_timeout_ms", 20_000),
            ],
        )
        shared = None
        if config.shared_log is not None:
            from midstream.server._journal import SharedLog  # noqa: PLC0415 - see above

            # The models, decoder settings and conversation setting: only they decode a
            # conversation the same. Without a setting the identity is what it was before
            # settings existed, so replicas of either version still continue each other's.
            # The setting is the bundle's own, so a given bundle already set to one counts
            # even when the config names none.
            models = (",".join(info.sha256 for info in bundle.describe())
                      + f";lag={config.max_open_words};settle={config.settle}"
                      + (f";setting={setting}" if setting is not None else ""))
            shared = self._shared = SharedLog(config.shared_log, self.metrics.registry,
                                              models=lambda: models,
                                              on_health=self._shared_health)
            await shared.start()
        self._servicer = MidstreamServicer(bundle, limits, self.metrics, load=load,
                                           shared=shared)
        # Not the generated registration: requests that do not decode must reach the servicer.
        add_servicer(self._servicer, server)
        self._health = health.aio.HealthServicer()
        health_pb2_grpc.add_HealthServicer_to_server(self._health, server)
        reflection.enable_server_reflection(
            (SERVICE_NAME, health.SERVICE_NAME, reflection.SERVICE_NAME), server)
        address = f"{self.config.host}:{self.config.port}"
        try:
            if credentials is None:
                port = server.add_insecure_port(address)
            else:
                port = server.add_secure_port(address, credentials)
        except RuntimeError as exc:
            raise UnavailableError(f"cannot listen on {address}: {exc}") from exc
        if port == 0:
            raise UnavailableError(f"cannot listen on {address}")
        await server.start()
        self._server, self._port = server, port
        self._loop_lag.start()
        for name in ("", SERVICE_NAME):
            await self._health.set(name, health_pb2.HealthCheckResponse.SERVING)
        if shared is not None:
            self._shared_health(shared.healthy)
        if self.config.metrics_port is not None:
            try:
                self._metrics_port = self.metrics.serve(self.config.metrics_host,
                                                        self.config.metrics_port)
            except OSError as exc:
                await self.stop(0)
                raise UnavailableError(f"cannot serve metrics on port "
                                       f"{self.config.metrics_port}: {exc}") from exc
        build = build_name()
        if build == "mixed":
            _log.warning("only some per-word modules are compiled (%s): a stale or partial "
                         "install; reinstall the compiled build or the plain one",
                         ", ".join(compiled_modules()))
        _log.info("serving on %s:%d (%s, %s build)%s, utterance functions in %s", self.config.host,
                  port, "TLS" if credentials else "plaintext", build,
                  f", metrics on port {self._metrics_port}" if self._metrics_port else "",
                  f"setting {setting!r}" if setting is not None
                  else "no setting (shared weights)")

    def _shared_health(self, healthy: bool) -> None:
        """Report the shared log's state under its own health name (the service still serves
        its callers while the log is degraded)."""
        from midstream.server._journal import SHARED_LOG_HEALTH  # noqa: PLC0415

        if self._health is None:
            return
        status = (health_pb2.HealthCheckResponse.SERVING if healthy
                  else health_pb2.HealthCheckResponse.NOT_SERVING)
        task = asyncio.ensure_future(self._health.set(SHARED_LOG_HEALTH, status))
        self._health_tasks.add(task)
        task.add_done_callback(self._health_tasks.discard)

    async def stop(self, grace: float | None = None) -> None:
        """Drain and stop; idempotent.

        Health turns NOT_SERVING and new conversations are refused (``UNAVAILABLE``); every
        live conversation is finished so its caller and followers receive the final update and
        ``ended`` (``SERVER_SHUTDOWN``); streams still open after ``grace`` seconds (default
        ``config.grace_s``) are cancelled.
        """
        if self._stopped or self._server is None:
            self._stopped = True
            self._loop_lag.stop()
            self.metrics.close()
            return
        self._stopped = True
        grace = self.config.grace_s if grace is None else grace
        assert self._health is not None and self._servicer is not None
        await self._health.enter_graceful_shutdown()
        self._servicer.begin_stopping()
        live = self._servicer.registry.live_count
        self._servicer.registry.close_all(EndReason.SERVER_SHUTDOWN)
        _log.info("stopping: finished %d live conversations, grace %.1f s", live, grace)
        if self._shared is not None:
            # Their ends (and anything still buffered) reach the log before the streams close.
            await self._shared.stop(grace)
        await self._server.stop(grace)
        self._loop_lag.stop()
        self.metrics.close()

    async def wait_for_termination(self) -> None:
        """Wait until the gRPC server has stopped."""
        if self._server is not None:
            await self._server.wait_for_termination()

    async def __aenter__(self) -> MidstreamServer:
        await self.start()
        return self

    async def __aexit__(self, exc_type: type[BaseException] | None,
                        exc: BaseException | None, tb: TracebackType | None) -> None:
        await self.stop()


def _setting_of(bundle: Bundle) -> str | None:
    """The conversation setting ``bundle`` labels in (``None`` for a bundle without one, or of
    a kind that has no settings)."""
    setting = getattr(bundle, "setting", None)
    return setting if isinstance(setting, str) else None
