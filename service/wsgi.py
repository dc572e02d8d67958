"""WSGI entry point: ``gunicorn service.wsgi:app`` (settings from the environment)."""

from service.app import create_app

app = create_app()
