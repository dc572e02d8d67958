"""The Flask application factory.

The factory builds the worker's services (settings, store, live models) into one
:class:`~service.app_state.AppState` on the app, installs the error handlers, puts two WSGI
layers in front of Flask (the predict shortcut, then request ids and the access log) and
registers the blueprints; the routes live in :mod:`service.routes` and read their services
through :func:`service.app_state.state`. Routes and fields are fixed by the README's
HTTP API.
"""

from __future__ import annotations

from flask import Flask

from service import access_log
from service.app_state import KEY, AppState
from service.routes import admin, discovery, errors, pages, predict
from service.settings import Settings


def create_app(settings: Settings | None = None, watch: bool = True) -> Flask:
    """Build the app; ``watch`` starts the live.json watcher thread (off in unit tests)."""
    settings = settings or Settings.from_env()
    app = Flask(__name__)
    app.config["MAX_CONTENT_LENGTH"] = settings.max_body_bytes
    app.extensions[KEY] = app_state = AppState.build(settings, watch)
    errors.install(app, settings.max_body_bytes)
    # WSGI layers, innermost first: the predict shortcut, then request ids and the log
    app.wsgi_app = predict.PredictShortcut(app.wsgi_app, app_state)
    access_log.install(app, settings.access_log)

    app.register_blueprint(discovery.bp)
    app.register_blueprint(predict.bp)
    app.register_blueprint(admin.bp)
    app.register_blueprint(pages.bp)
    return app
