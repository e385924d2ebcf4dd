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
    import multiprocessing
    from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait

    # spawn: a fresh interpreter per worker; nothing compiled or loaded in this
    # process is shared with the workers.
    pool = ProcessPoolExecutor(max_workers=workers, mp_context=multiprocessing.get_context("spawn"),
                               initializer=_pool_init, initargs=(ctx,))
    todo = deque(indices)
    running = set()
    try:
        while todo or running:
            while todo and len(running) < 4 * workers:
                running.add(pool.submit(_pool_run, todo.popleft()))
            done, running = wait(running, return_when=FIRST_COMPLETED)
            for fut in done:
                on_record(fut.result())
    finally:
        pool.shutdown(wait=not running, cancel_futures=True)


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
