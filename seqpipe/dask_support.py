"""Run builds on a Dask cluster (optional extra ``dask``: ``pip install '.[dask]'`` in a checkout).

``client.get_executor(pure=False)`` matters: with the default ``pure=True`` Dask treats repeated
identical calls as one and drops them. Each submitted task costs a scheduler round trip, so
the build sends consecutive parts together (``_runner.Batch``, a few per worker thread: see
``cluster_slots``). Tasks are idempotent (deterministic names, atomic
writes), so a task retried after a worker dies writes the same bytes again.
"""

from __future__ import annotations

from concurrent.futures import Executor
from typing import Any

from seqpipe.errors import SeqpipeError


def connect(address: str) -> tuple[Any, Executor]:
    """A ``distributed.Client`` for ``address`` and an executor over it."""
    try:
        from distributed import Client
    except ImportError:
        raise SeqpipeError(
            "--dask-scheduler needs the Dask extra: pip install '.[dask]' in a seqpipe checkout"
        ) from None
    try:
        client = Client(address, timeout="20s")  # type: ignore[no-untyped-call]
    except (OSError, TimeoutError) as exc:
        raise SeqpipeError(f"cannot reach the Dask scheduler at {address} ({exc})") from exc
    return client, client.get_executor(pure=False)  # type: ignore[no-untyped-call]


def executor_for_client(client: Any) -> Executor:
    """The executor seqpipe uses for an existing ``distributed.Client``."""
    ex: Executor = client.get_executor(pure=False)
    return ex


def cluster_slots(executor: Any) -> int | None:
    """The threads of the workers behind a ``distributed`` executor (None: none yet, or not
    one whose client can be asked): how many tasks it runs at once."""
    client = getattr(executor, "_client", None)  # distributed's ClientExecutor keeps its client here
    if client is None:
        return None
    try:
        threads = client.nthreads()
    except (OSError, TimeoutError):
        return None
    return sum(int(n) for n in threads.values()) or None
