"""gunicorn's threaded worker with deadlines on what a client may make it wait for.

The service is reached directly inside a cluster (no buffering proxy in front), so a slow or
idle client must never hold what other callers need:

- a request head is read by the worker's event loop, not by a thread: the connection is
  handed to a thread only once its whole head has arrived, and closed when that takes more
  than :data:`HEAD_SECONDS` after it connected (a silent connection, a browser's spare, a
  client trickling its headers) or after the first byte following a kept-alive pause (the
  pause itself ends after gunicorn's ``keepalive``, the same 5 s);
- the body must arrive whole within :data:`BODY_SECONDS` of the head (else 408,
  :class:`service.errors.ClientTooSlow` through the app) and the answer must be taken within
  :data:`SEND_SECONDS` of its first byte (else the connection is closed);
- one predict request per worker is parsed and computed at a time
  (:data:`service.answers.COMPUTE_SLOT`), so the threads overlap waiting on sockets, never
  CPU: workers × engine threads stay within the cores, as with one request per worker.
"""

from __future__ import annotations

import selectors
import time
from functools import partial

from gunicorn.workers.gthread import TConn, ThreadWorker

from service.errors import ClientTooSlow

#: Longest time from connecting (or from a kept-alive connection's next first byte) until
#: a request head is complete; a connection over it is closed without an answer.
HEAD_SECONDS = 5.0
#: Longest time from a complete head until the whole body has been read.
BODY_SECONDS = 10.0
#: Longest time from the first byte of an answer until the client has taken all of it.
SEND_SECONDS = 10.0
#: A head larger than this is handed to gunicorn's parser as it is, which refuses it.
HEAD_LIMIT = 64 * 1024
#: Bytes that end a request head.
_HEAD_END = b"\r\n\r\n"


class DeadlineSocket:
    """A client socket whose blocking reads and writes stop at a deadline.

    ``recv`` waits at most until ``read_by`` (``time.monotonic()``) and ``sendall`` at most
    :data:`SEND_SECONDS` from the first byte of the answer; past either, ClientTooSlow (a
    TimeoutError, which gunicorn's body drain already treats as "close the connection").
    Everything else goes to the socket itself.
    """

    __slots__ = ("raw", "read_by", "send_by", "closing")

    def __init__(self, raw):
        self.raw = raw
        self.read_by: float | None = None
        self.send_by: float | None = None
        self.closing = False

    def __getattr__(self, name):
        return getattr(self.raw, name)

    def arm(self, read_seconds: float) -> None:
        """A new request: its body has ``read_seconds``; its answer's clock is not started."""
        self.read_by = time.monotonic() + read_seconds
        self.send_by = None

    def _within(self, by: float, what: str) -> None:
        left = by - time.monotonic()
        if left <= 0:
            raise ClientTooSlow(what)
        self.raw.settimeout(left)

    def shutdown(self, how: int) -> None:
        """The first step of gunicorn's graceful close, which then reads until the client
        closes too (up to 2 s, in the event loop): from here on reads take only what has
        already arrived, so a client that never closes cannot stall the loop."""
        self.closing = True
        self.raw.shutdown(how)

    def recv(self, size: int) -> bytes:
        if self.closing:
            self.raw.setblocking(False)
            return self.raw.recv(size)
        if self.read_by is None:
            return self.raw.recv(size)
        what = f"the request did not arrive within {BODY_SECONDS:g} s of its head"
        self._within(self.read_by, what)
        try:
            return self.raw.recv(size)
        except TimeoutError:
            raise ClientTooSlow(what) from None

    def sendall(self, data) -> None:
        if self.send_by is None:
            self.send_by = time.monotonic() + SEND_SECONDS
        what = f"the client did not take the answer within {SEND_SECONDS:g} s"
        self._within(self.send_by, what)
        try:
            self.raw.sendall(data)
        except TimeoutError:
            raise ClientTooSlow(what) from None


class DeadlineWorker(ThreadWorker):
    """gunicorn's gthread worker that reads request heads in its event loop (module doc)."""

    def accept(self, listener) -> None:
        try:
            client, addr = listener.accept()
        except (BlockingIOError, ConnectionAbortedError):  # taken by another worker, gone
            return
        self.nr_conns += 1
        conn = TConn(self.cfg, DeadlineSocket(client), addr, listener.getsockname())
        conn.head = bytearray()
        self.enqueue_req(conn)

    def enqueue_req(self, conn) -> None:
        """To a thread once the head is complete; until then in the event loop."""
        if conn.parser is not None:  # a kept-alive connection: read-ahead comes first
            conn.head = bytearray(conn.parser.unreader.take_buffered())
        else:
            conn.head.clear()
        conn.timeout = time.monotonic() + HEAD_SECONDS
        conn.sock.setblocking(False)
        if self._read_head(conn, polled=False):  # most heads are there already
            self.pending_conns.append(conn)  # gunicorn's murder_pending closes at the deadline
            self.poller.register(conn.sock, selectors.EVENT_READ,
                                 partial(self._read_head, conn, True))

    def _read_head(self, conn, polled: bool, _sock=None) -> bool:
        """Take what has arrived; hand the connection to a thread once its head is whole
        (or too large to wait for), close it when the client left. True while waiting."""
        head = conn.head
        if _HEAD_END not in head and len(head) <= HEAD_LIMIT:
            try:
                data = conn.sock.raw.recv(HEAD_LIMIT)
            except (BlockingIOError, InterruptedError):
                return True
            except OSError:
                data = b""
            head += data
            if data and _HEAD_END not in head and len(head) <= HEAD_LIMIT:
                return True
        if polled:
            self.poller.unregister(conn.sock)
            self.pending_conns.remove(conn)
        if not head or (_HEAD_END not in head and len(head) <= HEAD_LIMIT):  # client left
            self.nr_conns -= 1
            conn.close()
            return False
        conn.data_ready = True  # gunicorn's own wait for a first byte is over
        super().enqueue_req(conn)
        return False

    def handle(self, conn):
        """In the thread: give the buffered head to gunicorn's parser, start the body's
        clock, then gunicorn's own handling."""
        conn.sock.setblocking(True)
        conn.init()
        conn.parser.unreader.unread(bytes(conn.head))
        conn.head.clear()
        conn.sock.arm(BODY_SECONDS)
        return super().handle(conn)

    def handle_request(self, req, conn):
        try:
            return super().handle_request(req, conn)
        except ClientTooSlow as exc:
            self.log.info("closed a connection from %s: %s", _peer(conn.client), exc)
            conn.sock.raw.close()  # here, not in the event loop's graceful close
            return False


def _peer(client) -> str:
    return client[0] if isinstance(client, tuple) and client else str(client)
