"""The Dask client a run uses: a ``LocalCluster`` on this machine (``"local"``) or an existing
scheduler's address. Dask is optional (extra ``bayesbase[scale]``); without it the error says
how to install it."""
from __future__ import annotations

import contextlib
import os

from ..errors import BayesbaseError

__all__ = ["require_distributed", "dask_client", "INSTALL_HINT"]

INSTALL_HINT = ("scoring on Dask needs dask.distributed, which is not installed: "
                "pip install 'bayesbase[scale]' (or run without --scheduler, in this process)")


def require_distributed():
    """The ``distributed`` module, or a :class:`~bayesbase.errors.BayesbaseError` saying how to
    install it."""
    try:
        import distributed
    except ImportError as exc:
        raise BayesbaseError(INSTALL_HINT) from exc
    return distributed


@contextlib.contextmanager
def dask_client(scheduler, workers: int | None = None):
    """A ``distributed.Client`` for the run: ``scheduler`` is ``"local"`` (a ``LocalCluster`` of
    ``workers`` processes, one thread each, Dask's worker profiler off; default: one per CPU),
    a scheduler address (``tcp://host:8786``; ``workers`` is then the cluster's business), or a
    ``Client`` already made (used as it is and left open)."""
    distributed = require_distributed()
    if isinstance(scheduler, distributed.Client):
        yield scheduler
        return
    with contextlib.ExitStack() as stack:
        if scheduler == "local":
            import dask

            n = int(workers or os.cpu_count() or 1)
            # Dask's statistical profiler samples each worker's stacks every few milliseconds; on
            # this Python-heavy task it cost 0.37-0.57 s instead of 0.22-0.30 s of CPU per
            # 5,000-case partition (measured here, 1 worker, bench.scale data)
            stack.enter_context(dask.config.set({"distributed.worker.profile.enabled": False}))
            cluster = stack.enter_context(distributed.LocalCluster(
                n_workers=n, threads_per_worker=1, processes=True, dashboard_address=":0"))
            client = stack.enter_context(distributed.Client(cluster))
        else:
            try:
                client = stack.enter_context(distributed.Client(scheduler, timeout="30s"))
            except OSError as exc:
                raise BayesbaseError(
                    f"cannot reach the Dask scheduler at {scheduler}: {exc}") from exc
        yield client
