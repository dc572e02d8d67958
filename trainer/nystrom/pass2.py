"""Pass 2 of a Nyström fit, run: every block's share (:func:`trainer.nystrom.parts.block_sums`)
on this machine's cores or on a Dask cluster, added in block order.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Callable, Iterable, Iterator

from service.settings import usable_cores
from trainer.nystrom import numerics
from trainer.nystrom.parts import PARTS, BlockPlan, BlockResult, HeldRows, block_sums


def in_threads(work: Callable, items: Iterable) -> Iterator:
    """``work(item)`` for every item, one thread per core, results in the items' order.

    Each thread runs single-threaded BLAS on its own items: two independent dsyrk calls keep
    both cores busy without the synchronization of one two-thread call, which stalls whenever
    another process takes a core, and the elementwise kernel work (one core per numpy call)
    runs on both cores too. At most one item per thread is in flight, so memory stays that of
    ``usable_cores()`` items however many there are.
    """
    workers = usable_cores()
    if workers < 2:
        yield from map(work, items)
        return
    from concurrent.futures import ThreadPoolExecutor

    from threadpoolctl import threadpool_limits

    with threadpool_limits(1, user_api="blas"), ThreadPoolExecutor(workers) as pool:
        pending: deque = deque()
        for item in items:
            pending.append(pool.submit(work, item))
            if len(pending) >= workers:
                yield pending.popleft().result()
        while pending:
            yield pending.popleft().result()


def run_pass2(plan: BlockPlan, blocks: list, cluster: str | None, progress
              ) -> tuple[numerics.Sums | None, dict[str, HeldRows]]:
    """The training sums and the held-out parts, from this process or a Dask cluster.

    Block results are added in block order: the same sums whoever computed them. With
    ``plan.keep_train`` the sums are None and the held parts include "train".
    """
    m, t = plan.landmarks.shape[0], len(plan.targets)
    sums = None if plan.keep_train else numerics.Sums.zeros(m, t)
    held: dict[str, list] = {p: [] for p in PARTS[int(not plan.keep_train):]}

    def add(res: BlockResult) -> None:
        if res.sums is not None:
            sums.add(res.sums)
        for part, rows in res.kept.items():
            held[part].append(rows)

    if cluster:
        from trainer.nystrom.cluster import map_blocks  # Dask only with --cluster

        for res in progress(map_blocks(cluster, plan, blocks), "fitting on the cluster"):
            add(res)
    else:
        for res in in_threads(lambda item: block_sums(plan, *item),
                              progress(blocks, "fitting")):
            add(res)
    d = len(plan.features)
    return sums, {p: HeldRows.stack(v, d, t) for p, v in held.items()}
