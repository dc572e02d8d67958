"""Whether this worker's predict requests leave room for background work (the shadow).

The request path marks each predict request in flight from before it waits for the compute
slot until its answer is built (:func:`started`, :func:`finished`); the shadow thread takes
the slot only once :func:`wait_until_idle` found nothing in flight and no request started
within the last :data:`QUIET_SECONDS`, so a caller never queues behind the shadow's work
except in the instant between that check and the slot being taken (re-checked after).

The marks are a list's ``append``/``pop`` and a float store: each one bytecode-level call,
atomic under the GIL, so the request path takes no extra lock.
"""

from __future__ import annotations

import time

#: Quiet time after the last request started before background work may take the slot
#: (a single client's next request usually comes within a millisecond of the last answer).
QUIET_SECONDS = 0.002

_in_flight: list[None] = []
_last_start = [0.0]


def started() -> None:
    """A predict request is about to wait for the compute slot."""
    _last_start[0] = time.monotonic()
    _in_flight.append(None)


def finished() -> None:
    """That request's answer is built (or it was refused)."""
    _in_flight.pop()


def busy() -> bool:
    """A request is in flight, or one started within :data:`QUIET_SECONDS`."""
    return bool(_in_flight) or time.monotonic() - _last_start[0] < QUIET_SECONDS


def wait_until_idle() -> None:
    """Return once :func:`busy` is false, sleeping out the quiet time meanwhile."""
    while True:
        if _in_flight:
            time.sleep(QUIET_SECONDS)
            continue
        left = QUIET_SECONDS - (time.monotonic() - _last_start[0])
        if left <= 0:
            return
        time.sleep(left)
