"""The shadow version: scored on the live version's requests after they are answered.

Per worker, :class:`ShadowRunner` keeps every model's shadow (``shadow.json``) loaded and
verified like a live version (through :meth:`LiveModels.pinned_version`: checksums, then a
warm-up prediction). A shadow that fails to load, or that takes features the live version
does not get or predicts other targets, is never used: the reason is logged, counted
(``kridge_shadow_load_failures``) and shown on the operator page; loading is retried only
when shadow.json changes.

The request path only puts (model, request rows, live results, request id, time) on a
bounded queue (:meth:`ShadowRunner.offer`); when the queue is full the request is not
shadowed and ``kridge_shadow_dropped`` counts it. One thread per worker takes the queue,
predicts the rows with the shadow under the worker's compute slot, in pieces of at most
:data:`PIECE_ROWS` rows (one computation per worker runs at a time: workers × engine
threads ≤ cores, as without a shadow). It takes the slot only in idle time: no predict
request in flight and none started in the last :data:`service.idle.QUIET_SECONDS`
(:func:`idle_slot`), so under steady traffic the queue fills and drops instead of the
callers waiting; a request that comes meanwhile waits for one piece at most. It observes
|shadow − live| per row and target, and, when ``KRIDGE_SHADOW_PAIRS`` names a file,
appends one JSON line per row (:func:`pair_lines`).
"""

from __future__ import annotations

import logging
import os
import queue
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timezone

import numpy as np
import orjson

from service import idle, traffic_metrics
from service.answers import COMPUTE_SLOT
from service.live_models import fault_kind
from service.model import Model
from service.store import Store, StoreError

log = logging.getLogger("kridge.shadow")

#: Most rows the shadow predicts per hold of the compute slot.
PIECE_ROWS = 256


@dataclass
class ShadowSlot:
    stamp: tuple | None = None  # (inode, mtime_ns, size) of shadow.json last acted on
    wanted: int | None = None  # version shadow.json names
    model: Model | None = None  # the shadow in use
    problem: str | None = None  # why ``wanted`` is not in use
    fits: int | None = None  # live version the shadow was last found compatible with


@dataclass
class Pending:
    """One answered live request waiting for the shadow."""

    name: str
    live_version: int
    live_features: list[str]
    shadow: Model
    rows: list
    ids: list[str] | None
    results: list[dict]
    request_id: str
    time: float


def compatible(live: Model, shadow: Model) -> str | None:
    """Why ``shadow`` cannot be scored on ``live``'s requests, or None."""
    missing = [f for f in shadow.features if f not in live.features]
    if missing:
        return (f"version {shadow.version} takes features the live version {live.version} "
                f"does not get: {', '.join(missing)}")
    if shadow.targets != live.targets:
        return (f"version {shadow.version} predicts {', '.join(shadow.targets)}, the live "
                f"version {live.version} {', '.join(live.targets)}")
    return None


def pair_lines(item: Pending, x: np.ndarray, live: np.ndarray, shadow: np.ndarray) -> bytes:
    """The pairs file's lines for one request: one JSON object per row with ``time`` (UTC,
    when the live answer was made), ``request_id``, ``model``, ``live_version``,
    ``shadow_version``, ``row`` (0-based in the request), ``id`` (the caller's row id or
    null), ``inputs`` (feature → raw value, live feature order), ``live`` and ``shadow``
    (the predictions: a number, or a list with several targets)."""
    when = datetime.fromtimestamp(item.time, timezone.utc).isoformat(timespec="milliseconds")
    multi = live.shape[1] > 1
    out = []
    for i in range(x.shape[0]):
        out.append(orjson.dumps({
            "time": when, "request_id": item.request_id, "model": item.name,
            "live_version": item.live_version, "shadow_version": item.shadow.version,
            "row": i, "id": item.ids[i] if item.ids is not None else None,
            "inputs": dict(zip(item.live_features, x[i].tolist(), strict=True)),
            "live": live[i].tolist() if multi else float(live[i, 0]),
            "shadow": shadow[i].tolist() if multi else float(shadow[i, 0]),
        }))
    return b"\n".join(out) + b"\n"


@contextmanager
def idle_slot():
    """Hold the compute slot, taken only while no request is in flight or just came
    (:mod:`service.idle`); let go and wait again when one arrived while taking it."""
    while True:
        idle.wait_until_idle()
        COMPUTE_SLOT.acquire()
        if not idle.busy():
            break
        COMPUTE_SLOT.release()
    try:
        yield
    finally:
        COMPUTE_SLOT.release()


class ShadowRunner:
    """Every model's shadow in this worker, the queue to it and the thread draining it."""

    def __init__(self, store: Store, models, queue_size: int, pairs: str | None = None):
        self.store = store
        self.models = models  # LiveModels: loads (and verifies) the shadow versions
        self.slots: dict[str, ShadowSlot] = {}
        self.queue: queue.Queue[Pending | None] = queue.Queue(queue_size)
        self.pairs = pairs
        self._pairs_fd: int | None = None
        self._pairs_failed = False
        self.done = 0  # requests shadowed by this worker

    # -- keeping in step with shadow.json ----------------------------------------------
    def refresh(self) -> None:
        """One pass: pick up new, changed and ended shadow pointers of the served models."""
        for name in list(self.models.slots):
            slot = self.slots.get(name)
            if slot is None:
                slot = self.slots[name] = ShadowSlot()
            path = self.store.model_dir(name) / "shadow.json"
            try:
                st = os.stat(path)
                stamp = (st.st_ino, st.st_mtime_ns, st.st_size)
            except FileNotFoundError:
                stamp = None
            except OSError as exc:
                stamp = ("unreadable", exc.errno)
            if stamp != slot.stamp:
                slot.stamp = stamp
                self._take(name, slot)

    def _take(self, name: str, slot: ShadowSlot) -> None:
        try:
            version = self.store.shadow_version(name)
        except StoreError as exc:
            slot.wanted, slot.model, slot.problem = None, None, str(exc)
            log.error("model %s: shadow pointer refused: %s", name, exc)
            return
        slot.wanted, slot.problem = version, None
        if version is None:
            if slot.model is not None:
                log.info("model %s: shadow version %s ended", name, slot.model.version)
            slot.model = None
            return
        try:
            model = self.models.pinned_version(name, version)
            live = self.models.loaded(name)
            why = compatible(live, model) if live is not None else None
            if why is not None:
                raise StoreError(why, "incompatible")
        except (StoreError, OSError, ValueError) as exc:
            slot.model = None
            slot.problem = f"shadow version {version} is not used: {exc}"
            log.error("model %s: shadow version %s refused (%s): %s", name, version,
                      fault_kind(exc), exc)
            traffic_metrics.SHADOW_FAILURES.labels(name, str(version)).inc()
            return
        traffic_metrics.touch(name)
        slot.fits = live.version if live is not None else None
        slot.model = model
        log.info("model %s: shadowing version %s in process %s", name, version, os.getpid())

    # -- the request path --------------------------------------------------------------
    def offer(self, name: str, live: Model, rows: list, ids, results: list[dict],
              request_id: str, when: float) -> None:
        """Queue an answered live request for the shadow; drop and count when full."""
        slot = self.slots.get(name)
        shadow = slot.model if slot is not None else None
        if shadow is None or shadow.version == live.version:
            return
        if slot.fits != live.version:  # the live version changed: once per change
            why = compatible(live, shadow)
            if why is not None:
                slot.model = None
                slot.problem = f"shadow version {shadow.version} is not used: {why}"
                log.error("model %s: %s", name, slot.problem)
                return
            slot.fits = live.version
        try:
            self.queue.put_nowait(Pending(name, live.version, live.features, shadow, rows,
                                          ids, results, request_id, when))
        except queue.Full:
            traffic_metrics.SHADOW_DROPPED.labels(name).inc()

    # -- the shadow thread -------------------------------------------------------------
    def run(self) -> None:
        """Take the queue until a None arrives."""
        while True:
            item = self.queue.get()
            if item is None:
                return
            try:
                self.score(item)
            except Exception:  # one bad item must not stop the shadow
                log.exception("shadowing a request of model %s failed", item.name)

    def score(self, item: Pending) -> None:
        """Predict one request's rows with the shadow and record the differences."""
        feats = item.live_features
        shadow = item.shadow
        text = shadow.encoding.any  # rows hold categories as strings: predict encodes them
        x = np.array([r if type(r) is list else [r[f] for f in feats] for r in item.rows],
                     dtype=object if text else np.float64)
        cols = [feats.index(f) for f in shadow.features]
        xs = x[:, cols] if cols != list(range(len(feats))) else x
        parts = []
        for start in range(0, xs.shape[0], PIECE_ROWS):
            # one computation per worker at a time, and only while no request waits for
            # it (module doc): a request queues behind one piece at most
            piece = xs[start:start + PIECE_ROWS]
            with idle_slot():
                parts.append(shadow.predict(piece).reshape(piece.shape[0], -1) if text
                             else shadow.engine.predict(piece, raw=True))
        predicted = np.vstack(parts)
        live = np.array([r["value"] for r in item.results], dtype=np.float64)
        live = live.reshape(x.shape[0], -1)
        hist = traffic_metrics.SHADOW_DIFFERENCE.labels(item.name)
        for d in np.abs(predicted - live).ravel().tolist():
            hist.observe(d)
        traffic_metrics.SHADOW_ROWS.labels(item.name).inc(x.shape[0])
        if self.pairs:
            self._write(pair_lines(item, x, live, predicted))
        self.done += 1

    def _write(self, data: bytes) -> None:
        """Append to the pairs file: one write per request on an O_APPEND descriptor, so
        lines of several workers never interleave within a request's lines."""
        try:
            if self._pairs_fd is None:
                self._pairs_fd = os.open(self.pairs, os.O_WRONLY | os.O_APPEND | os.O_CREAT
                                         | os.O_CLOEXEC, 0o644)
            os.write(self._pairs_fd, data)
        except OSError as exc:  # said once; the comparison itself goes on
            if not self._pairs_failed:
                log.error("shadow pairs file %s cannot be written: %s", self.pairs, exc)
            self._pairs_failed = True
        else:
            self._pairs_failed = False

    def problems(self) -> dict[str, str]:
        """Model → why its named shadow is not in use here."""
        return {n: s.problem for n, s in list(self.slots.items()) if s.problem}
