"""What the routes of one worker share: settings, the store, the live models and the cached
OpenAPI document. The factory builds one :class:`AppState` and puts it on the app; a route
reaches it through :func:`state`."""

from __future__ import annotations

from dataclasses import dataclass, field

import orjson
from flask import Flask, current_app

from service import metrics, traffic
from service.live_models import LiveModels
from service.openapi import build_openapi, describe_served
from service.settings import Settings
from service.store import Store

#: Key of the state in ``app.extensions``.
KEY = "kridge"


@dataclass
class AppState:
    settings: Settings
    store: Store
    models: LiveModels
    _openapi: dict[tuple, bytes] = field(default_factory=dict, repr=False)

    @classmethod
    def build(cls, settings: Settings, watch: bool) -> AppState:
        """Open the store and load what is live; ``watch`` keeps following live.json on a
        daemon thread (off in unit tests, which refresh once)."""
        store = Store(settings.store)
        models = LiveModels(store, settings.pinned_cache, on_load_failure=count_load_failure)
        if watch:
            models.start(settings.poll_seconds)
            traffic.install(traffic.Traffic(store, models, settings))
        else:
            models.refresh()
        return cls(settings, store, models)

    def openapi_doc(self) -> bytes:
        """The document for the models served now (rebuilt when what is served changes)."""
        served = describe_served(self.store, self.models)
        key = tuple(sorted(served.items()))
        if key not in self._openapi:
            self._openapi.clear()
            self._openapi[key] = orjson.dumps(build_openapi(
                self.settings.max_rows, self.settings.max_body_bytes, served))
        return self._openapi[key]


def count_load_failure(name: str, version: int, _why: str) -> None:
    metrics.LOAD_FAILURES.labels(name, str(version)).inc()


def state(app: Flask | None = None) -> AppState:
    """The state of ``app``, by default the app handling the current request."""
    return (app or current_app).extensions[KEY]
