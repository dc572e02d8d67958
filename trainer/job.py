"""The training job: options → plan → the chosen solver's stages → a published bundle.

:func:`train` checks the options once (:mod:`trainer.plan`), chooses the solver with its
reason, and runs that solver's job: :mod:`trainer.exact.job` (every row in memory) or
:mod:`trainer.nystrom.job` (streamed, landmark rows). Both end in the same stages:
calibration (:mod:`trainer.calibration`), envelope (:mod:`trainer.envelope_stats`),
manifest (:mod:`trainer.manifest`) and publish (:mod:`trainer.publish`).
"""

from __future__ import annotations

import time

from trainer.plan import TrainOptions, check_options, choose_method

__all__ = ["TrainOptions", "train"]


def train(opts: TrainOptions, log=print) -> dict:
    """Run the whole job; returns a summary (version, metrics, timings)."""
    t0 = time.perf_counter()
    store = check_options(opts)
    method, reason = choose_method(opts)
    if method == "nystrom":
        from trainer.nystrom.job import train_nystrom

        return train_nystrom(opts, store, log, t0, reason)
    from trainer.exact.job import train_exact

    return train_exact(opts, store, log, t0, reason)
