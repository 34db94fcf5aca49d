"""Where the blocks run: in this process, on a local Dask cluster, or on an existing one.

In: a task function, the cleaned runs every task reads, and the blocks.
Out: the tasks' results in block order; a block that fails is reported
with its place in the volume (:class:`BlockError`).

- ``scheduler=None, workers=1`` (the default): the blocks run one after
  another in this process, each on all the threads of the thread budget;
  nothing is copied, which keeps the memory of a large volume to one
  block's working set.
- ``workers=N`` (N > 1): a local Dask cluster of N worker processes with one
  thread each; the runs are sent to each worker once.
- ``scheduler="tcp://host:port"``: an existing Dask cluster; the workers
  need this package, and nothing but the runs and the block's options is
  sent to them.
"""

from __future__ import annotations

from .._parallel import limit_threads
from ..errors import EngineError

__all__ = ["BlockError", "BlockRunner"]


class BlockError(EngineError):
    """A block's task failed; ``block`` is its index, ``box`` its voxels ``(lo, hi)`` on its grid."""

    def __init__(self, message="", *, param=None, block=None, box=None):
        super().__init__(message, param=param)
        self.block, self.box = block, box


def _where(block):
    return ", ".join(f"{a}:{b}" for a, b in zip(block.lo, block.hi))


def _fail(step, block, exc):
    reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
    return BlockError(f"{step}: block {tuple(block.index)} (voxels z, y, x {_where(block)}) failed: {reason}",
                      block=tuple(block.index), box=(tuple(block.lo), tuple(block.hi)))


def _one_thread(fn, runs, block, kwargs):
    """A task on a Dask worker: one thread per worker process, so workers x threads stays within the cores."""
    with limit_threads(1):
        return fn(runs, block, **kwargs)


class BlockRunner:
    """Runs block tasks; a context manager that starts and stops any cluster it made.

    Parameters
    ----------
    scheduler : str, distributed.Client or None
        Address of a running Dask scheduler, or a client.
    workers : int or None
        Worker processes of a local cluster when no scheduler is given;
        1 or None runs the blocks in this process.
    """

    def __init__(self, *, scheduler=None, workers=None):
        self.scheduler = scheduler
        self.workers = int(workers or 1)
        self.client = None
        self._owned = []

    def __enter__(self):
        if self.scheduler is None and self.workers <= 1:
            return self
        if self.scheduler is None or isinstance(self.scheduler, str):
            from ..batch.engine import _client

            self.client, cluster = _client(workers=self.workers, scheduler=self.scheduler, memory_limit=0)
            self._owned = [self.client] + ([cluster] if cluster is not None else [])
        else:
            self.client = self.scheduler
        return self

    def __exit__(self, *exc):
        for thing in self._owned:
            thing.close()
        self._owned = []
        return False

    def share(self, runs):
        """``runs`` as the tasks receive it: itself here, or a future of one copy per worker."""
        if self.client is None:
            return runs
        return self.client.scatter(runs, broadcast=True)

    def release(self, shared):
        """Let the workers drop what :meth:`share` sent them."""
        if self.client is not None and hasattr(shared, "release"):
            shared.release()

    def map(self, fn, runs, blocks, *, step, kwargs_of, progress=None):
        """``[fn(runs, block, **kwargs_of(i)) for i, block in enumerate(blocks)]``, in block order.

        ``progress(done, total)`` after each block.
        """
        n = len(blocks)
        if self.client is None:
            out = []
            for i, block in enumerate(blocks):
                try:
                    out.append(fn(runs, block, **kwargs_of(i)))
                except MemoryError:
                    raise
                except Exception as exc:
                    raise _fail(step, block, exc) from exc
                if progress is not None:
                    progress(i + 1, n)
            return out
        futures = [self.client.submit(_one_thread, fn, runs, block, kwargs_of(i), pure=False)
                   for i, block in enumerate(blocks)]
        out = []
        # In block order: a block's result is taken as soon as it and those
        # before it are done, while the others keep running.
        for i, future in enumerate(futures):
            try:
                out.append(future.result())
            except Exception as exc:
                for f in futures:
                    f.cancel()
                raise _fail(step, blocks[i], exc) from exc
            future.release()
            if progress is not None:
                progress(i + 1, n)
        return out
