"""Pass 2 of a Nyström fit on an existing Dask cluster (``--cluster tcp://host:8786``).

Each task opens the training file itself (a path every worker can read: a shared file
system) and returns the sums of its block; the sums are added here in block order, so the
result does not depend on how many workers there are or which finished first. The CG solver
(:class:`ClusterRows`) reads each block once into a worker's memory and sends every pass's
products K_bᵀ(K_b v) to the blocks. Dask is imported only here, only when ``--cluster`` is
given.
"""

from __future__ import annotations

from collections.abc import Iterator

from trainer.errors import UserError


def map_blocks(address: str, plan, blocks: list) -> Iterator:
    """Results of :func:`trainer.nystrom.parts.block_sums` for every (block, first row), in
    block order, each fetched when the caller asks for it (one block's m × m sums at a time
    here, however many blocks there are)."""
    from trainer.nystrom.parts import block_sums

    client = _connect(address)
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


def _connect(address: str):
    try:
        from distributed import Client
    except ImportError:
        raise UserError("--cluster needs dask.distributed "
                        "(pip install 'kridge[cluster]')") from None
    try:
        return Client(address, timeout="10s")
    except (OSError, TimeoutError) as exc:
        raise UserError(f"cannot reach the Dask scheduler at {address}: {exc}") from None


def _held_of(res) -> tuple[dict, int, object]:
    """A block's held-out parts, its training row count and target sums (sent back)."""
    x, y, _t = res.kept["train"]
    return {k: v for k, v in res.kept.items() if k != "train"}, x.shape[0], y.sum(axis=0)


def _apply(fn, kern, res, *args):
    """Σ fn(kern, x, y, *args) over the block's chunks, on the worker that holds it."""
    from trainer.nystrom.cg import block_total

    x, y, _t = res.kept["train"]
    return block_total(fn, kern, x, y, *args)


class ClusterRows:
    """The training rows of a CG fit, block by block on Dask workers, read once.

    ``rows(fn, *args)`` = Σ_blocks fn(kern, x_block, y_block, *args) computed where each block
    lives and added here in block order, the same sum as :class:`LocalRows` gives.
    """

    def __init__(self, address: str, plan, blocks: list):
        from trainer.nystrom.cg import TILE_DTYPE, tiles_text
        from trainer.nystrom.parts import block_sums

        self.client = _connect(address)
        self.tiles = tiles_text(TILE_DTYPE)
        try:
            from service.kernels import KernelBlocks

            shared = self.client.scatter(plan, broadcast=True)
            kern = KernelBlocks(plan.spec, plan.landmarks, dtype=TILE_DTYPE)
            self.kern = self.client.scatter(kern, broadcast=True)
            self.blocks = [self.client.submit(block_sums, shared, block, first, pure=False)
                           for block, first in blocks]
            self.held_rows, counts, sums = [], 0, 0.0
            for fut in self.blocks:
                held, count, y_sum = self.client.submit(_held_of, fut, pure=False).result()
                self.held_rows.append(held)
                counts += count
                sums = sums + y_sum
        except BaseException:
            self.client.close()
            raise
        self.count = int(counts)
        self.mean = sums / max(self.count, 1)

    def __call__(self, fn, *args):
        scattered = [self.client.scatter(a, broadcast=True) for a in args]
        futures = [self.client.submit(_apply, fn, self.kern, b, *scattered, pure=False)
                   for b in self.blocks]
        total = None
        for fut in futures:  # block order
            part = fut.result()  # None for a block without training rows
            fut.release()
            if part is not None:
                total = part if total is None else total + part
        return total

    def close(self) -> None:
        self.client.close()
