"""Running work on a dask.distributed cluster: connect with a bounded wait, send paths, gather small results.

The pattern every distributed run of the package follows: the client sends each task only
names (absolute paths, or fsspec URLs such as ``s3://…/stack.zarr``) and settings; the worker
opens its inputs, writes its outputs itself (to a filesystem the client can also see, or to
the URL), and sends back a small result (a table of ROI statistics, QC counts, output
checksums).  Nothing the size of an image travels between client and workers.

Any dask scheduler address works: ``tcp://host:8786`` from ``dask scheduler``, a
``LocalCluster``'s address, or one started on a batch system by dask-jobqueue.
"""

from __future__ import annotations

import os
import time
from collections.abc import Callable, Iterable
from pathlib import Path

from probeplan.errors import input_error

__all__ = ["CONNECT_TIMEOUT_S", "WORKER_WAIT_S", "connect", "absolute_location", "run_tasks"]

#: Seconds allowed to reach the scheduler.
CONNECT_TIMEOUT_S = 5.0
#: Seconds allowed for at least one worker to be attached to it.
WORKER_WAIT_S = 4.0


def connect(address: str, *, connect_timeout_s: float = CONNECT_TIMEOUT_S, worker_wait_s: float = WORKER_WAIT_S,
            option: str = "scheduler"):
    """A ``distributed.Client`` for ``address`` with at least one worker, or a one-line InputError.

    Both waits are bounded (``connect_timeout_s + worker_wait_s``, 9 s by default), so an
    unreachable scheduler or one without workers is reported instead of waiting forever.

    Raises
    ------
    InputError
        The address is empty, the scheduler cannot be reached, or it has no worker.
    """
    try:
        from distributed import Client
    except ImportError:  # pragma: no cover - dependency of the package
        raise input_error(option, "dask.distributed is not installed", "install dask[distributed]") from None
    if not isinstance(address, str) or not address.strip():
        raise input_error(option, f"{address!r} is not a scheduler address", "give e.g. tcp://host:8786")
    t0 = time.monotonic()
    try:
        client = Client(address, timeout=f"{connect_timeout_s}s", set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise input_error(option, f"cannot reach the scheduler at {address!r} within {time.monotonic() - t0:.0f} s "
                          f"({reason})", "start the cluster first, check the address, or run without a scheduler") from None
    try:
        client.wait_for_workers(1, timeout=worker_wait_s)
    except (TimeoutError, OSError):
        client.close()
        raise input_error(option, f"the scheduler at {address!r} has no workers (waited {worker_wait_s:g} s)",
                          f"start workers with 'dask worker {address}' (or through your batch system), "
                          "or run without a scheduler") from None
    return client


def absolute_location(path) -> str:
    """``path`` as workers must see it: an absolute local path, or an fsspec URL unchanged.

    Examples
    --------
    >>> absolute_location("s3://bucket/a.zarr")
    's3://bucket/a.zarr'
    >>> Path(absolute_location("a.tif")).is_absolute()
    True
    """
    text = os.fspath(path)
    if "://" in text:
        return text
    return str(Path(text).absolute())


def run_tasks(client, fn: Callable, items: Iterable, *, on_result: Callable | None = None, **kwargs) -> list:
    """Run ``fn(item, **kwargs)`` for every item on the cluster; results in the order of ``items``.

    Every task is submitted at once (the scheduler spreads them over the workers; the client
    holds only futures), and each small result is handed to ``on_result(index, result)`` as it
    arrives.  On an error or an interrupt the tasks not yet finished are cancelled.
    """
    from distributed import as_completed

    items = list(items)
    futures = [client.submit(fn, item, pure=False, **kwargs) for item in items]
    index = {f.key: i for i, f in enumerate(futures)}
    results: list = [None] * len(items)
    try:
        with client.as_current():
            finished = as_completed(futures)
        for fut in finished:
            i = index[fut.key]
            results[i] = fut.result()
            fut.release()
            if on_result is not None:
                on_result(i, results[i])
    except BaseException:
        client.cancel([f for f in futures if not f.done()])
        raise
    return results
