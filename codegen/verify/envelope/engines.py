"""Engines that run the cases: a local process pool, or a Dask cluster.

Both hand every finished record to ``on_record`` in the order cases finish;
what a record holds does not depend on the engine (codegen.verify.envelope.cases).
"""

from __future__ import annotations

from collections import deque

from codegen.errors import InputError
from codegen.verify.envelope.cases import CaseContext, run_case


_worker_ctx = None


def _pool_init(ctx: CaseContext) -> None:
    global _worker_ctx
    _worker_ctx = ctx


def _pool_run(index: int) -> dict:
    return run_case(_worker_ctx, index)


def run_local(ctx: CaseContext, indices, workers: int, on_record) -> None:
    """Run ``indices`` on a local process pool (in this process if workers == 1)."""
    indices = list(indices)
    if workers <= 1:
        for i in indices:
            on_record(run_case(ctx, i))
        return
    from contextlib import closing

    from codegen.progress import bounded_map
    # closing: a failing on_record (a full disk, say) cancels the cases not started.
    with closing(bounded_map(_pool_run, indices, workers, _pool_init, (ctx,),
                             in_flight=4 * workers)) as records:
        for record in records:
            on_record(record)


def run_dask(ctx: CaseContext, indices, address: str, on_record) -> None:
    """Run ``indices`` on the Dask distributed scheduler at ``address``."""
    try:
        from distributed import Client, as_completed
    except ImportError:  # pragma: no cover - dask is a dependency
        raise InputError("--scheduler", address, "needs the 'distributed' package") from None
    try:
        client = Client(address, timeout=30, set_as_default=False)
    except (OSError, TimeoutError) as exc:
        raise InputError("--scheduler", address, f"cannot connect to a Dask scheduler: {exc}") from None
    try:
        threads = max(1, sum(client.nthreads().values()))
        todo = deque(indices)
        if not todo:
            return

        def submit_one():
            return client.submit(run_case, ctx, todo.popleft(), pure=False)

        window = as_completed([submit_one() for _ in range(min(len(todo), 4 * threads))],
                              loop=client.loop)
        for fut in window:
            on_record(fut.result())
            fut.release()
            if todo:
                window.add(submit_one())
    finally:
        client.close()
