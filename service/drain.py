"""Drain on SIGTERM: stop looking ready, keep answering, then let gunicorn stop the workers.

A load balancer (or a Kubernetes Service) needs a moment to stop sending traffic to a
replica that is going away. Without a drain, gunicorn closes its listening socket and stops
its workers the instant SIGTERM arrives, and the requests still on their way are reset.

With ``KRIDGE_DRAIN_SECONDS`` > 0, the first SIGTERM to the gunicorn master

1. sets a flag shared with every worker, so ``/readyz`` answers 503 at once;
2. keeps every worker answering (predictions included) for the drain period;
3. then runs gunicorn's own graceful stop: listeners closed, workers told to finish the
   request they hold and exit, a worker still busy after ``graceful_timeout`` killed.

A second SIGTERM during the drain changes nothing; SIGINT or SIGQUIT still stop at once.
The flag is one byte of anonymous shared memory made when this module is imported in the
master (the gunicorn config imports it), so workers forked later share it without files.
"""

from __future__ import annotations

import logging
import mmap
import os
import signal
import threading
from typing import Any

log = logging.getLogger("kridge.drain")

_FLAG = mmap.mmap(-1, 1)  # MAP_SHARED | MAP_ANONYMOUS: survives fork as shared memory


def begin() -> None:
    """Mark this process group (master and all forked workers) as draining."""
    _FLAG[0] = 1


def active() -> bool:
    """True once the master received SIGTERM and the drain has begun."""
    return _FLAG[0] == 1


def install(server: Any, seconds: float) -> None:
    """Wrap the gunicorn arbiter's SIGTERM handler with a drain of ``seconds``.

    gunicorn dispatches a queued signal to ``server.handle_<name>``; an attribute set on the
    arbiter instance therefore replaces the class's handler for this master only.
    """
    if seconds <= 0:
        return
    original = server.handle_term
    state = {"deadline_passed": False}

    def finish() -> None:
        state["deadline_passed"] = True
        server.log.info("drain: %.3g s over, stopping the workers", seconds)
        os.kill(os.getpid(), signal.SIGTERM)  # back through gunicorn's own signal queue

    def handle_term() -> None:
        if state["deadline_passed"]:
            original()
            return
        if active():
            server.log.info("drain: already draining, SIGTERM ignored (SIGINT stops at once)")
            return
        begin()
        server.log.info("drain: /readyz answers 503; serving for %.3g s more, then stopping",
                        seconds)
        timer = threading.Timer(seconds, finish)
        timer.daemon = True
        timer.start()

    server.handle_term = handle_term
