"""The app factory: settings in, a FastAPI app out; its lifespan owns the store."""

from __future__ import annotations

import asyncio
import logging
import sys
from collections.abc import AsyncIterator, Callable
from contextlib import asynccontextmanager, suppress
from datetime import datetime
from functools import partial
from typing import TYPE_CHECKING

from fastapi import FastAPI
from fastapi.middleware.cors import CORSMiddleware
from threadpoolctl import threadpool_limits

from .. import __version__
from ..actions import counts, stale
from ..actions import keys as keys_actions
from ..actions.unit import Work
from ..config import Settings
from ..kernels import PROCESS, KernelBuild
from ..metrics import Metrics, StoreGauges
from ..ratelimit import RateLimiter
from ..store import Store
from ..store.tables import utcnow
from ..web import routes as web
from ..webhooks.dispatcher import Dispatcher
from . import docs, errors
from .deps import AppContext, KeyCache
from .middleware import BodyLimit, RequestMetrics, SecurityHeaders
from .routes import (
    audit,
    calibrations,
    channels,
    curves,
    health,
    keys,
    lifecycle,
    references,
    samples,
    snapshots,
    webhooks,
)

#: how long a thread may hold the interpreter lock while another waits for it, seconds
#: (Python's default: 0.005). The event loop's thread needs the lock back after every
#: wait on a socket; with worker threads parsing, validating and storing a large batch,
#: each hand-back cost up to 5 ms, several times a request (a 1-value predict's p99 went
#: from 3 to 15 ms while another client posted batches; 7 ms at 0.5 ms, and batches of
#: 1,000 and 10,000 kept their throughput side by side: tests/bench/ingest_bench.py)
SWITCH_INTERVAL_S = 0.0005

if TYPE_CHECKING:
    from ..mqtt import Subscriber
    from ..mqtt.feed import Publisher

DESCRIPTION = """Keeps each sensor channel's calibration curve current as reference
readings arrive. Send `Authorization: Bearer <api key>` on every route except
`/healthz` and `/readyz`. The service supports, and does not replace, traceable
accredited calibration and the rules that apply where the sensors are used."""


def mqtt_subscriber(ctx: AppContext) -> Subscriber:
    """The MQTT subscriber of ``ctx.settings.mqtt_url``: each message learned through the
    same unit of work and action as ``POST /v1/channels/{id}/samples``. Imported here: a
    service without MQTT starts without the client library."""
    from ..mqtt import Subscriber, Topics, ingest_message

    s = ctx.settings
    assert s.mqtt_url is not None
    topics = Topics(s.mqtt_topic_root, s.mqtt_share_group)
    return Subscriber(s.mqtt_url, partial(ingest_message, ctx.work, s, ctx.metrics), client_id=s.mqtt_client_id,
                      topics=topics, session_expiry_s=s.mqtt_session_expiry_s)


def mqtt_publisher(settings: Settings) -> Publisher:
    """The event feed's MQTT connection (client id ``{mqtt_client_id}-events``); imported
    here, as the subscriber is."""
    from ..mqtt.feed import Publisher

    assert settings.mqtt_url is not None
    return Publisher(settings.mqtt_url, f"{settings.mqtt_client_id}-events")


def create_app(settings: Settings | None = None, *, kernels: KernelBuild | None = None,
               clock: Callable[[], datetime] = utcnow) -> FastAPI:
    """The service app. ``kernels``: the build of the compiled kernels that ``/readyz``
    waits for (default: the process's own, started by the lifespan); ``clock``: aware UTC
    time now, for the receipt of samples and the silence watch (tests move their own)."""
    settings = settings or Settings.from_env()
    build = kernels or PROCESS
    logging.getLogger("curvekeeper").setLevel(settings.log_level.upper())
    metrics = Metrics()
    limiter = RateLimiter.from_settings(settings)

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        # one BLAS thread: requests are the unit of parallelism here; on shared cores a
        # multi-threaded BLAS stalled fits and predicts by up to 10x (tests/bench/cost_bench.py)
        threadpool_limits(limits=1)
        switch = sys.getswitchinterval()
        sys.setswitchinterval(SWITCH_INTERVAL_S)
        build.start()  # in its own thread: the loop answers /healthz meanwhile
        store = Store(settings.database_url, busy_timeout_s=settings.busy_timeout_s)
        try:
            if settings.admin_key:
                with store.transaction(write=True) as repo:
                    keys_actions.ensure_admin_key(repo, settings.admin_key)
        except BaseException:
            store.dispose()
            raise
        work = Work(store, clock=clock)
        ctx = app.state.ctx = AppContext(settings, store, metrics, KeyCache(), limiter, build, work)
        gauges = StoreGauges(lambda: counts.store_reading(work), settings.metrics_cache_s)
        metrics.watch_store(gauges)
        sweeper = (asyncio.create_task(stale.sweep_forever(work, settings.stale_sweep_s))
                   if settings.stale_sweep_s > 0 else None)
        dispatcher = (asyncio.create_task(Dispatcher(work, settings, metrics=metrics)
                                          .run_forever(settings.webhook_dispatch_s))
                      if settings.webhook_dispatch_s > 0 else None)
        subscriber = mqtt_subscriber(ctx) if settings.mqtt_url else None
        publisher = mqtt_publisher(settings) if settings.mqtt_url and settings.mqtt_events_s > 0 else None
        feed = None
        try:
            if subscriber is not None:
                subscriber.start()
            if publisher is not None:
                from ..mqtt.feed import EventFeed

                events = EventFeed(work, publisher, root=settings.mqtt_topic_root, metrics=metrics)
                events.prepare()
                publisher.start()
                feed = asyncio.create_task(events.run_forever(settings.mqtt_events_s))
            yield
        finally:
            if subscriber is not None:
                subscriber.stop()
            for task in (sweeper, dispatcher, feed):
                if task is not None:
                    task.cancel()
                    with suppress(asyncio.CancelledError):
                        await task
            if publisher is not None:
                publisher.stop()
            metrics.unwatch_store(gauges)
            store.dispose()
            sys.setswitchinterval(switch)

    # docs_url/redoc_url off: FastAPI's pages load their scripts from a CDN; ours are local
    app = FastAPI(title="curvekeeper", version=__version__, description=DESCRIPTION, lifespan=lifespan,
                  docs_url=None, redoc_url=None)
    errors.install(app)
    docs.install(app, "curvekeeper")
    for module in (health, channels, samples, curves, calibrations, snapshots, lifecycle, keys, audit, references,
                   webhooks, web):
        app.include_router(module.router)
    app.include_router(web.root)
    app.add_middleware(BodyLimit, max_bytes=settings.max_body_bytes)
    origins = [o.strip() for o in settings.cors_origins.split(",") if o.strip()]
    if origins:  # closed unless configured: no browser page elsewhere may call the API
        app.add_middleware(CORSMiddleware, allow_origins=origins, allow_methods=["GET", "POST", "PATCH", "DELETE"],
                           allow_headers=["Authorization", "Content-Type"], max_age=600)
    app.add_middleware(SecurityHeaders)
    app.add_middleware(RequestMetrics, metrics=metrics)
    return app
