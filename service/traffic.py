"""What a worker does with the live traffic after answering it: drift while serving
(:mod:`service.drift_window`) and the shadow version (:mod:`service.shadow`).

The predict route makes one call, :func:`after_answer`, once the answer is built; it only
offers the request's rows to the drift window and puts the request on the shadow queue.
Two daemon threads per worker do the rest: ``kridge-traffic`` follows shadow.json (every
``KRIDGE_POLL_SECONDS``) and runs the drift tests (every ``KRIDGE_DRIFT_SECONDS``);
``kridge-shadow`` predicts the queued requests with the shadow. Both compute under the
worker's compute slot, so one computation per worker runs at a time, as for requests.
Requests pinned to a version (``?version=N``) are neither sampled nor shadowed: both are
about the live version.
"""

from __future__ import annotations

import logging
import threading
import time

from service.access_log import REQUEST_ID
from service.drift_window import DriftMonitor
from service.shadow import ShadowRunner
from service.store import Store

log = logging.getLogger("kridge.traffic")


class Traffic:
    """One worker's drift monitor and shadow runner, and the thread that drives them."""

    def __init__(self, store: Store, models, settings):
        self.models = models
        self.drift = DriftMonitor(settings.drift_window, settings.drift_permutations)
        self.drift_on = settings.drift_seconds > 0
        self.shadow = ShadowRunner(store, models, settings.shadow_queue, settings.shadow_pairs)
        self.poll_seconds = settings.poll_seconds
        self.drift_seconds = settings.drift_seconds
        self._stop = threading.Event()

    def after_answer(self, name: str, model, req, results: list[dict], rid: str) -> None:
        """The request path's one call (module doc); only for the live version."""
        if self.models.loaded(name) is not model:
            return
        # text features: the served drift test compares numeric rows only
        if self.drift_on and not model.encoding.any:
            self.drift.offer(name, model, req.rows)
        self.shadow.offer(name, model, req.rows, req.ids, results, rid, time.time())

    def start(self) -> None:
        self.shadow.refresh()
        threading.Thread(target=self._watch, name="kridge-traffic", daemon=True).start()
        threading.Thread(target=self.shadow.run, name="kridge-shadow", daemon=True).start()

    def stop(self) -> None:
        self._stop.set()
        self.shadow.queue.put(None)

    def _watch(self) -> None:
        next_drift = time.monotonic() + self.drift_seconds
        while not self._stop.wait(self.poll_seconds):
            try:
                self.shadow.refresh()
                if self.drift_on and time.monotonic() >= next_drift:
                    next_drift = time.monotonic() + self.drift_seconds
                    self.drift.check_all(self.models.loaded)
            except Exception:  # keep watching whatever one pass hit
                log.exception("drift or shadow pass failed")


#: This worker's :class:`Traffic`, set when the app starts its background threads.
CURRENT: Traffic | None = None


def install(traffic: Traffic) -> None:
    global CURRENT
    CURRENT = traffic
    traffic.start()


def after_answer(name: str, model, req, results: list[dict], environ: dict) -> None:
    """The predict route's hook: hand an answered request to this worker's :class:`Traffic`
    (nothing when none runs, as in unit tests that build the app without its threads)."""
    traffic = CURRENT
    if traffic is not None:
        try:
            traffic.after_answer(name, model, req, results, environ.get(REQUEST_ID, ""))
        except Exception:  # the answer is made: whatever happens here must not change it
            log.exception("model %s: sampling or shadowing a request failed", name)
