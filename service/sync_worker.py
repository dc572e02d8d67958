"""gunicorn's sync worker with a bound on how long a new connection may stay silent.

A sync worker serves one connection at a time and, once it has accepted one, waits for the
request with no time limit. Browsers open connections ahead of need (to save a handshake on
the next click) and may leave them idle; such a connection would hold a worker until the
browser drops it or gunicorn's ``timeout`` kills the worker (60 s, then a restart that loads
every model again), while requests from other systems queue. This worker waits at most
:data:`FIRST_BYTE_SECONDS` for the first byte of a request and otherwise closes the
connection; a browser opens a fresh one when it has something to send. Real clients send
their request right after connecting, so they never meet the bound.
"""

from __future__ import annotations

import select

from gunicorn import util
from gunicorn.workers.sync import SyncWorker

#: Longest wait for the first byte of a request on a connection just accepted.
FIRST_BYTE_SECONDS = 5.0


class PromptSyncWorker(SyncWorker):
    """A sync worker that closes connections which send nothing within the bound."""

    def accept(self, listener):
        client, addr = listener.accept()
        client.setblocking(1)
        util.close_on_exec(client)
        poller = select.poll()  # poll, not select: any descriptor number works
        poller.register(client, select.POLLIN)
        if not poller.poll(FIRST_BYTE_SECONDS * 1000):
            self.log.debug("closed a connection that sent nothing for %.0f s",
                           FIRST_BYTE_SECONDS)
            util.close(client)
            return
        self.handle(listener, client, addr)
