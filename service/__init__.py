"""kridge runtime: load a verified model bundle and serve k(x, X)·α over HTTP.

``from service import load_model`` is the small, stable Python API; the Flask app factory is
``service.app.create_app``.
"""

from service.bundle import Model, load_model

__all__ = ["Model", "load_model"]
