"""Pass 2 of a Nyström fit on an existing Dask cluster (``--cluster tcp://host:8786``).

Each task opens the training file itself (a path every worker can read: a shared file
system) and returns the sums of its block; the sums are added here in block order, so the
result does not depend on how many workers there are or which finished first. Dask is
imported only here, only when ``--cluster`` is given.
"""

from __future__ import annotations

from collections.abc import Iterator

from trainer.errors import UserError


def map_blocks(address: str, plan, blocks: list) -> Iterator:
    """Results of :func:`trainer.nystrom.parts.block_sums` for every (block, first row), in
    block order, each fetched when the caller asks for it (one block's m × m sums at a time
    here, however many blocks there are)."""
    try:
        from distributed import Client
    except ImportError:
        raise UserError("--cluster needs dask.distributed "
                        "(pip install 'kridge[cluster]')") from None
    from trainer.nystrom.parts import block_sums

    try:
        client = Client(address, timeout="10s")
    except (OSError, TimeoutError) as exc:
        raise UserError(f"cannot reach the Dask scheduler at {address}: {exc}") from None
    try:
        # the plan (landmarks, standardization) goes to the workers once, not per task
        shared = client.scatter(plan, broadcast=True)
        futures = [client.submit(block_sums, shared, block, first, pure=False)
                   for block, first in blocks]
        for future in futures:
            yield future.result()
            future.release()
    finally:
        client.close()
