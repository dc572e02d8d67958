"""kridge runtime: load a verified model bundle and serve k(x, X)·α over HTTP.

``from service import load_model`` is the small, stable Python API; the Flask app factory is
``service.app.create_app``.

Importing this package loads nothing heavy: the gunicorn config lives in it and must set the
BLAS thread environment before numpy (and OpenBLAS's thread pool) is loaded anywhere, or the
workers inherit a multi-threaded BLAS from the master through fork.
"""

from __future__ import annotations

__all__ = ["Model", "load_model"]


def __getattr__(name: str):
    if name in __all__:
        from service import model

        return getattr(model, name)
    raise AttributeError(f"module 'service' has no attribute {name!r}")
