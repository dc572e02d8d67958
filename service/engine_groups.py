"""Prediction for targets with different kernels: one engine per distinct kernel.

Targets that share a kernel (family and parameters) share one :class:`~service.engine.Engine`:
one kernel evaluation against the training rows and one product with their dual columns,
whatever their ridges. Targets with different kernels need one kernel block per distinct
kernel, so a model with g distinct kernels costs about g single-kernel predictions
(DEVELOPERS.md, "Measured limits", has the measured ratios). The answer's columns are in
target order whatever the grouping.
"""

from __future__ import annotations

import numpy as np

from service.engine import Engine
from service.kernels import KernelSpec
from service.target_kernels import kernel_groups


class GroupedEngine:
    """k_j(q, X)·α_j for every target j, one :class:`Engine` per distinct kernel k_j.

    Parameters
    ----------
    specs : one kernel per target (column of ``dual``).
    x_train, dual, dtype, shift, scale, offset, threads : as for :class:`Engine`; ``dual``
        is (n, t) and ``offset`` (t,).
    neighbours : as for :class:`Engine`; given to the first distance-kernel group only,
        whose product then also yields the novelty neighbours' distances.
    """

    def __init__(self, specs: list[KernelSpec], x_train: np.ndarray, dual: np.ndarray, *,
                 dtype=np.float64, neighbours=None, shift=None, scale=None, offset=None,
                 threads: int | None = None):
        dual = np.asarray(dual)
        dual = dual if dual.ndim == 2 else dual[:, None]
        if dual.shape[1] != len(specs):
            raise ValueError(f"{len(specs)} target kernels for {dual.shape[1]} dual columns")
        self.targets = dual.shape[1]
        offset = np.zeros(self.targets) if offset is None else np.asarray(offset, np.float64)
        self.groups: list[tuple[np.ndarray, Engine]] = []
        near_given = False
        for spec, cols in kernel_groups(list(specs)):
            wants = neighbours is not None and not near_given and spec.uses == "sqdist"
            eng = Engine(spec, x_train, dual[:, cols], threads=threads, dtype=dtype,
                         neighbours=neighbours if wants else None, shift=shift,
                         scale=scale, offset=offset.reshape(-1)[cols])
            near_given = near_given or eng.gives_neighbours
            self.groups.append((np.asarray(cols, dtype=np.intp), eng))
        self._near_group = next((i for i, (_, e) in enumerate(self.groups)
                                 if e.gives_neighbours), None)
        first = self.groups[0][1]
        self.n, self.d, self.dtype, self.shift = first.n, first.d, first.dtype, first.shift

    @property
    def gives_neighbours(self) -> bool:
        """True when ``predict`` can also give the k-th neighbour distances (``near``)."""
        return self._near_group is not None

    @property
    def specs(self) -> list[KernelSpec]:
        """The distinct kernels, one per group."""
        return [e.spec for _, e in self.groups]

    def predict(self, q: np.ndarray, near: np.ndarray | None = None,
                raw: bool = False) -> np.ndarray:
        """(m, t) predictions in target order (:meth:`Engine.predict` for each group)."""
        if near is not None and self._near_group is None:
            raise ValueError("this engine was built without neighbour rows")
        q = np.ascontiguousarray(q, dtype=np.float64)
        out = np.empty((q.shape[0] if q.ndim == 2 else 0, self.targets))
        for i, (cols, eng) in enumerate(self.groups):
            out[:, cols] = eng.predict(q, near if i == self._near_group else None, raw)
        return out


def engine_for(specs: list[KernelSpec], x_train: np.ndarray, dual: np.ndarray,
               **options) -> Engine | GroupedEngine:
    """A plain :class:`Engine` when every target has the same kernel (the common case: no
    extra cost at all), else a :class:`GroupedEngine`."""
    if len(set(specs)) == 1:
        columns = np.shape(dual)[1] if np.ndim(dual) == 2 else 1
        if columns != len(specs):
            raise ValueError(f"{len(specs)} target kernels for {columns} dual columns")
        return Engine(specs[0], x_train, dual, **options)
    return GroupedEngine(specs, x_train, dual, **options)


__all__ = ["GroupedEngine", "engine_for"]
