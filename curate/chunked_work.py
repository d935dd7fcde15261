"""Run a function over chunks of work items: local processes, a Dask cluster, or in line.

Shared by hashing (:mod:`curate.hash_files`) and the crop check (:mod:`curate.crop_files`):
the function must be importable by a worker process and return one result per item.
"""

from __future__ import annotations

import os
from concurrent.futures import ProcessPoolExecutor, as_completed

__all__ = ["resolve_workers", "run_chunks"]


def resolve_workers(workers: int | None) -> int:
    """``workers`` checked, or the number of cores when None.

    >>> resolve_workers(2)
    2
    """
    if workers is None:
        return os.cpu_count() or 1
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise ValueError(f"workers must be a positive integer or None, got {workers!r}")
    return workers


def _chunks(items: list, size: int, parallel: int = 1) -> list[list]:
    """Consecutive chunks of at most ``size`` items, smaller toward the end (what is left over
    ``2 * parallel``), so the workers run out of work at nearly the same time.

    >>> [len(c) for c in _chunks(list(range(40)), 8, parallel=2)]
    [8, 8, 6, 5, 4, 3, 2, 1, 1, 1, 1]
    """
    out, start = [], 0
    while start < len(items):
        step = max(1, min(size, -(-(len(items) - start) // (2 * parallel))))
        out.append(items[start:start + step])
        start += step
    return out


def run_chunks(func, items, *, workers: int, client=None, progress: bool = True, desc: str = "",
               unit: str = "item", chunk_size: int = 16):
    """Yield ``func(chunk)`` (a list, one result per item) for chunks of ``items`` as each
    finishes, with a progress bar.

    Chunks hold at most ``chunk_size`` items, fewer so that each worker gets about 4,
    and the last ones fewer still (see :func:`_chunks`), so no core idles at the end.
    With a ``dask.distributed.Client`` the chunks run on its cluster; with one worker
    or one chunk, in this process.

    >>> list(run_chunks(list, range(5), workers=1, progress=False, chunk_size=2))
    [[0, 1], [2, 3], [4]]
    """
    from tqdm.auto import tqdm

    items = list(items)
    parallel = workers if client is None else max(1, sum(client.nthreads().values()))
    size = max(1, min(chunk_size, -(-len(items) // (4 * parallel))))
    chunks = _chunks(items, size, parallel)
    bar = tqdm(total=len(items), desc=desc, unit=unit, disable=not progress)

    def done(result):
        bar.update(len(result))
        return result

    try:
        if client is not None:
            from dask.distributed import as_completed as dask_completed

            for future in dask_completed(client.map(func, chunks, pure=False)):
                yield done(future.result())
        elif workers == 1 or len(chunks) <= 1:
            for chunk in chunks:
                yield done(func(chunk))
        else:
            import multiprocessing

            methods = multiprocessing.get_all_start_methods()
            ctx = multiprocessing.get_context("fork" if "fork" in methods else "spawn")
            with ProcessPoolExecutor(max_workers=min(workers, len(chunks)), mp_context=ctx) as pool:
                for future in as_completed([pool.submit(func, chunk) for chunk in chunks]):
                    yield done(future.result())
    finally:
        bar.close()
