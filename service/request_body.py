"""The predict body's limits, enforced before any work: the byte limit while the body is
read (chunked bodies included), the row limit by counting brackets before JSON parsing
builds a single object.

A valid request ``{"rows": [...], "coverage": c}`` holds one array or object per row, the
rows list and the body itself: at most ``max_rows + 2`` of them. Counting ``[`` and ``{``
bytes is one C-level pass and an upper bound (brackets inside strings count too); only a
body over that bound is scanned for the brackets outside strings (:func:`container_counts`,
a few passes of numpy over the bytes) and, when it really holds more, refused unparsed.
"""

from __future__ import annotations

import re

import numpy as np

from service.errors import ApiError, ClientTooSlow

_READ = 1 << 16
_BLOCK = 1 << 20
_SPACE = re.compile(rb"[ \t\r\n]*")
_QUOTE, _BACKSLASH = 0x22, 0x5C
_OPEN = (0x5B, 0x7B)  # [ {
_CLOSE = (0x5D, 0x7D)  # ] }


def body_too_large(max_body_bytes: int) -> ApiError:
    return ApiError(413, "request_entity_too_large",
                    f"request body is larger than {max_body_bytes} bytes (KRIDGE_MAX_BODY_BYTES)")


def too_many_rows(rows: int, max_rows: int) -> ApiError:
    return ApiError(413, "too_many_rows",
                    f"{rows} rows in one request; the limit is {max_rows} (KRIDGE_MAX_ROWS)")


def read_body(environ: dict, max_body_bytes: int) -> bytes:
    """The request body, refused (413) as soon as it is known to exceed ``max_body_bytes``:
    from Content-Length before reading, or, for a chunked body (no length), once one byte
    more than the limit has arrived. A body the client does not finish sending within the
    worker's deadline is a 408."""
    stream = environ["wsgi.input"]
    length = environ.get("CONTENT_LENGTH") or ""
    try:
        if length:
            if int(length) > max_body_bytes:
                raise body_too_large(max_body_bytes)
            return stream.read(int(length))
        parts, size = [], 0
        while chunk := stream.read(min(_READ, max_body_bytes + 1 - size)):
            size += len(chunk)
            if size > max_body_bytes:
                raise body_too_large(max_body_bytes)
            parts.append(chunk)
        return b"".join(parts)
    except ClientTooSlow as exc:
        raise ApiError(408, "request_timeout", str(exc)) from None


def container_counts(raw: bytes) -> tuple[int, int]:
    """(arrays and objects in ``raw``, those at nesting depth 3), brackets inside JSON
    strings left out; depth 1 is the body, 2 its members (the rows list), 3 the rows.

    A string runs from an unescaped ``"`` to the next; a quote is escaped when an odd run
    of backslashes precedes it (RFC 8259 §7). The bytes are scanned in blocks, carrying
    the in-string parity and the depth across them, so memory beyond the body is one byte
    per body byte (the quote mask) and a few per byte of one block.
    """
    b = np.frombuffer(raw, np.uint8)
    quote = _real_quotes(b, raw)
    total = rows = 0
    inside, depth = np.uint8(0), 0
    for at in range(0, b.size, _BLOCK):
        part = b[at:at + _BLOCK]
        parity = np.bitwise_xor.accumulate(quote[at:at + _BLOCK].view(np.uint8)) ^ inside
        inside = parity[-1]
        outside = parity == 0
        opens = ((part == _OPEN[0]) | (part == _OPEN[1])) & outside
        brackets = part[opens | (((part == _CLOSE[0]) | (part == _CLOSE[1])) & outside)]
        if not brackets.size:
            continue
        is_open = (brackets == _OPEN[0]) | (brackets == _OPEN[1])
        after = np.cumsum(is_open.astype(np.int8) * 2 - 1, dtype=np.int64) + depth
        depth = int(after[-1])
        total += int(np.count_nonzero(is_open))
        rows += int(np.count_nonzero(is_open & (after == 3)))
    return total, rows


def _real_quotes(b: np.ndarray, raw: bytes) -> np.ndarray:
    """Mask of the quotes that open or close a string (escaped ones left out)."""
    quote = b == _QUOTE
    if b'\\"' in raw:  # escaped quotes: rare, so their cost is paid only then
        q = np.flatnonzero(quote[1:]) + 1
        q = q[b[q - 1] == _BACKSLASH]  # quotes right after a backslash
        backslash = b == _BACKSLASH
        starts = np.flatnonzero(backslash[1:] & ~backslash[:-1]) + 1  # runs of them
        if backslash[0]:
            starts = np.concatenate(([0], starts))
        run = q - starts[np.searchsorted(starts, q - 1, side="right") - 1]
        quote[q[run % 2 == 1]] = False
    return quote


def refuse_before_parsing(raw: bytes, max_rows: int) -> None:
    """Raise for a body holding more arrays and objects than a valid request of at most
    ``max_rows`` rows can: 413 when an object body has too many rows, else 422."""
    bound = max_rows + 2
    if raw.count(b"[") + raw.count(b"{") <= bound:
        return
    total, rows = container_counts(raw)
    if total <= bound:
        return
    start = _SPACE.match(raw).end()
    is_object = raw[start:start + 1] == b"{"
    if is_object and rows > max_rows:
        raise too_many_rows(rows, max_rows)
    raise ApiError(422, "invalid_request",
                   f"the body holds {total} arrays and objects; a request of at most "
                   f"{max_rows} rows holds at most {bound} (one per row, the rows list and "
                   "the body): row values must be numbers")
