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

__all__ = ["BlockError", "BlockRunner", "KeptBlocks"]


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

    def map(self, fn, runs, blocks, *, step, kwargs_of, progress=None, kept=None):
        """``[fn(runs, block, **kwargs_of(i)) for i, block in enumerate(blocks)]``, in block order.

        ``progress(done, total)`` after each block. ``kept`` (a
        :class:`KeptBlocks`) gives the results of blocks finished by an
        earlier, interrupted run and keeps each new one as it finishes.
        """
        n = len(blocks)
        out = [None] * n
        todo = []
        for i, block in enumerate(blocks):
            got = kept.get(step, block) if kept is not None else None
            if got is None:
                todo.append(i)
            else:
                out[i] = got
        done = [n - len(todo)]

        def finished(i):
            if kept is not None:
                kept.put(step, blocks[i], out[i])
            done[0] += 1
            if progress is not None:
                progress(done[0], n)

        if self.client is None:
            for i in todo:
                try:
                    out[i] = fn(runs, blocks[i], **kwargs_of(i))
                except MemoryError:
                    raise
                except Exception as exc:
                    raise _fail(step, blocks[i], exc) from exc
                finished(i)
            return out
        futures = {i: self.client.submit(_one_thread, fn, runs, blocks[i], kwargs_of(i), pure=False) for i in todo}
        # In block order: a block's result is taken as soon as it and those
        # before it are done, while the others keep running.
        for i, future in futures.items():
            try:
                out[i] = future.result()
            except Exception as exc:
                for f in futures.values():
                    f.cancel()
                raise _fail(step, blocks[i], exc) from exc
            future.release()
            finished(i)
        return out


class KeptBlocks:
    """Finished blocks kept on disk, so that an interrupted analysis resumes where it stopped.

    Each block's result is one ``.npz`` file in ``folder``, named by the
    step and the block, written atomically; a file ``KEY`` holds a digest of
    everything the results depend on (the input file's size and times, the
    configuration, the spacing, the block edge), and a folder whose key
    differs is emptied of vesselflow's block files before use.

    Parameters
    ----------
    folder : Path
        Created when the first block is kept; vesselflow writes only
        ``KEY`` and ``*.block.npz`` in it.
    key : str
    """

    MARK = "KEY"

    def __init__(self, folder, key):
        from pathlib import Path

        self.folder, self.key = Path(folder), key
        mark = self.folder / self.MARK
        # Made when the first block is kept, so a run refused before any
        # block finished leaves nothing behind.
        self.ready = mark.is_file() and mark.read_text(encoding="utf-8") == key
        self.resumed = 0

    def _path(self, step, block):
        return self.folder / (f"{step}-" + "-".join(str(int(i)) for i in block.index) + ".block.npz")

    def get(self, step, block):
        import numpy as np

        path = self._path(step, block)
        if not self.ready or not path.is_file():
            return None
        try:
            with np.load(path, allow_pickle=False) as z:
                out = {k: (z[k].item() if z[k].ndim == 0 else z[k]) for k in z.files}
        except (OSError, ValueError, EOFError):
            return None  # cut short when the run stopped: done again
        if "halo" in out:
            out["halo"] = tuple(int(v) for v in out["halo"])
        self.resumed += 1
        return out

    def put(self, step, block, result):
        import os

        import numpy as np

        if not self.ready:
            self.folder.mkdir(parents=True, exist_ok=True)
            for f in self.folder.glob("*.block.npz"):
                f.unlink()  # kept for another input or configuration
            (self.folder / self.MARK).write_text(self.key, encoding="utf-8")
            self.ready = True
        path = self._path(step, block)
        tmp = path.with_name("." + path.name + ".partial.npz")
        np.savez(tmp, **{k: np.asarray(v) for k, v in result.items()})
        os.replace(tmp, path)

    @classmethod
    def remove_folder(cls, folder):
        """Delete kept blocks and their folder (only what vesselflow wrote there), after a finished analysis."""
        from pathlib import Path

        folder = Path(folder)
        if not (folder / cls.MARK).is_file():
            return
        for f in list(folder.glob("*.block.npz")) + list(folder.glob(".*.partial.npz")):
            f.unlink()
        (folder / cls.MARK).unlink(missing_ok=True)
        try:
            folder.rmdir()
        except OSError:
            pass  # something else is in it: left as it is
