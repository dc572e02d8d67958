"""Loaded models of one worker process, kept in step with the store.

A daemon thread polls every model's ``live.json`` (a cheap ``stat``: a release replaces the
file by rename, so its inode and mtime change). When the live version changes, the new
version is loaded and verified on that thread and swapped in with one reference assignment.
A version that fails to load is never served: the old one keeps serving, the failure is
logged and counted, and loading is retried only when live.json changes again.

Two loads happen on a request thread, both under this object's locks so that one bundle is never
loaded twice at once: a model first seen after the last poll (the request waits for one
refresh pass, which the watcher may be running already), and versions pinned by
``?version=N``, which load on demand into a small LRU cache.
"""

from __future__ import annotations

import logging
import os
import threading
import weakref
from collections import OrderedDict
from collections.abc import Callable
from dataclasses import dataclass

from service.l1_distance import warming
from service.model import Model, load_model
from service.store import NotFound, Store, StoreError

log = logging.getLogger("kridge.live_models")


@dataclass
class LiveSlot:
    stamp: tuple | None = None  # (inode, mtime_ns, size) of live.json last acted on
    wanted: int | None = None  # version live.json names
    model: Model | None = None  # version being served
    problem: str | None = None  # why ``wanted`` is not being served
    refused: str | None = None  # reason class when ``wanted`` failed verification


class Gate:
    """The lock one bundle's load is taken under; held in a weak-value table, so it lives
    only while some thread loads (or waits for) that bundle and the table stays as small as
    the loads under way, however many versions are asked for."""

    __slots__ = ("lock", "__weakref__")

    def __init__(self):
        self.lock = threading.Lock()


def fault_kind(exc: BaseException) -> str:
    """The reason class of a failed load (see :data:`service.store.names.FAULT_KINDS`)."""
    if isinstance(exc, StoreError):
        return exc.kind
    return "unreadable" if isinstance(exc, OSError) else "damaged"


def warm(model: Model) -> None:
    """One prediction (at the training minimum) before the version is served, so that its
    first-call costs, the laplacian's compiled loop above all, are paid here and not by the
    first request: a worker says ready only with every live model warmed."""
    with warming():
        model.score(model.low_row())
    log.info("model %s: version %s warmed in process %s", model.name, model.version,
             os.getpid())


class LiveModels:
    """The models this worker serves: the live version of each, plus a few pinned ones."""

    def __init__(
        self,
        store: Store,
        pinned_cache: int = 4,
        on_load_failure: Callable[[str, int, str], None] | None = None,
    ):
        self.store = store
        self.slots: dict[str, LiveSlot] = {}
        self.pinned: OrderedDict[tuple[str, int], Model] = OrderedDict()
        self.pinned_cache = pinned_cache
        self.on_load_failure = on_load_failure
        self._lock = threading.Lock()  # guards the pinned cache
        self._refreshing = threading.Lock()  # one refresh pass at a time
        # one load per bundle at a time; entries vanish when no thread holds them
        self._loading: weakref.WeakValueDictionary[tuple[str, int], Gate] = (
            weakref.WeakValueDictionary())
        self.loads = 0  # bundles loaded here (live and pinned)
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None

    # -- keeping in step with the store --------------------------------------------------
    def refresh(self) -> None:
        """One pass over the store: pick up new models and changed live pointers."""
        with self._refreshing:
            self._refresh()

    def _load(self, name: str, version: int) -> Model:
        """Load one bundle, or take it from the pinned cache; never the same one twice at
        once (a second caller waits for the first and shares its result)."""
        with self._lock:
            gate = self._loading.get((name, version))
            if gate is None:
                gate = self._loading[(name, version)] = Gate()
        with gate.lock:
            model = self._cached_pinned(name, version)
            if model is None:
                model = load_model(self.store, name, version)
                warm(model)
                self.loads += 1
                with self._lock:
                    self.pinned[(name, version)] = model
                    while len(self.pinned) > self.pinned_cache:
                        self.pinned.popitem(last=False)
            return model

    def _refresh(self) -> None:
        for name in self.store.models():
            slot = self.slots.setdefault(name, LiveSlot())
            path = self.store.model_dir(name) / "live.json"
            try:
                st = os.stat(path)
                stamp = (st.st_ino, st.st_mtime_ns, st.st_size, st.st_mode)
            except FileNotFoundError:
                stamp = None
            except OSError as exc:  # a loop, a folder on the way that is a file: read tells
                stamp = ("unreadable", exc.errno)
            if stamp == slot.stamp:
                continue
            slot.stamp = stamp
            try:
                version = self.store.live_version(name)
            except StoreError as exc:
                slot.problem = str(exc)
                continue
            slot.wanted = version
            if version is None or (slot.model is not None and slot.model.version == version):
                slot.problem = slot.refused = None
                continue
            try:
                model = self._load(name, version)
            except (StoreError, OSError, ValueError) as exc:
                slot.problem = f"version {version} was not loaded: {exc}"
                slot.refused = fault_kind(exc)
                log.error("model %s: live version %s refused: %s", name, version, exc)
                if self.on_load_failure is not None:
                    self.on_load_failure(name, version, str(exc))
                continue
            slot.model = model  # the swap: requests see old or new, never half
            slot.problem = slot.refused = None
            log.info("model %s: now serving version %s", name, version)

    def start(self, interval: float) -> None:
        """Load what is live now, then keep polling on a daemon thread."""
        self.refresh()
        self._thread = threading.Thread(
            target=self._poll, args=(interval,), name="kridge-live-watch", daemon=True
        )
        self._thread.start()

    def stop(self) -> None:
        self._stop.set()

    def _poll(self, interval: float) -> None:
        while not self._stop.wait(interval):
            try:
                self.refresh()
            except Exception:  # keep watching whatever one pass hit
                log.exception("refreshing models from the store failed")

    # -- lookups from request handlers ---------------------------------------------------
    def live(self, name: str) -> Model:
        """The live model, or NotFound/StoreError with a message for the caller."""
        slot = self.slots.get(name)
        if slot is None or slot.model is None:
            self.store.versions(name)  # NotFound when no such model
            if slot is None or slot.problem is None:
                # created after our last poll, or being loaded by another thread right now:
                # wait for one refresh pass (its lock makes this the only load)
                self.refresh()
                slot = self.slots.get(name)
            if slot is None or slot.model is None:
                why = slot.problem if slot and slot.problem else "no version is live yet"
                raise NotFound(f"model {name!r} has nothing to serve: {why}")
        return slot.model

    def refused(self, name: str, version: int | None) -> str | None:
        """The reason class when ``version`` (the live one) was refused here, else None
        (also None while it is still loading)."""
        slot = self.slots.get(name)
        if slot is None or slot.refused is None or slot.wanted != version:
            return None
        return slot.refused

    def loaded(self, name: str) -> Model | None:
        """The live model when it is loaded already, else None; never loads or waits."""
        slot = self.slots.get(name)
        return slot.model if slot is not None else None

    def _cached_pinned(self, name: str, version: int) -> Model | None:
        with self._lock:
            model = self.pinned.get((name, version))
            if model is not None:
                self.pinned.move_to_end((name, version))
            return model

    def pinned_version(self, name: str, version: int) -> Model:
        """A specific version: the live model if it is that one, else load into the LRU."""
        slot = self.slots.get(name)
        if slot is not None and slot.model is not None and slot.model.version == version:
            return slot.model
        return self._load(name, version)

    def readiness(self) -> tuple[bool, dict[str, int | None], dict[str, str]]:
        """Ready when every model with a live version is served at that version."""
        served, problems = {}, {}
        for name, slot in list(self.slots.items()):
            served[name] = slot.model.version if slot.model else None
            behind = slot.model is None or slot.model.version != slot.wanted
            if slot.problem and slot.model is None:  # e.g. a damaged live.json at start
                problems[name] = slot.problem
            elif slot.wanted is not None and behind:
                problems[name] = slot.problem or f"version {slot.wanted} is loading"
        return not problems, served, problems


__all__ = ["LiveModels", "NotFound"]
