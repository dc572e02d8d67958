"""gunicorn config for the kridge service: `gunicorn -c deploy/gunicorn.conf.py`.

The settings live in the package (service/gunicorn_config.py) so an installed kridge without
this folder runs with the same ones; override any of them here or on the command line.
"""

from service.gunicorn_config import *  # noqa: F403
from service.gunicorn_config import child_exit, on_starting, when_ready  # noqa: F401  (hooks)
