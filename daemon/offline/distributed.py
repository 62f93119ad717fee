"""Reprocessing on a Dask distributed cluster.

``DaskRunner(address)`` connects a ``dask.distributed.Client`` to a running
scheduler and submits one task per frame set (``reprocess.process_frame_set``
on a ``FrameSetTask``). Tasks carry the run file's absolute path and frame
rows, never arrays: each Dask worker opens the HDF5 file read-only and reads
its own frames, so the client sends a few hundred bytes per frame set and
only the estimates come back. Consequently every worker must see the run
files at the same path (a shared or replicated file system) and run the same
maskrun version (the results file records the client's version; a worker with
a different one gives different bits, which ``maskrun reconstruct`` cannot
detect).

Dask is an optional dependency (extra ``cluster``); importing this module
without it is fine, using it raises ``ReprocessError`` with the install hint.
"""

from __future__ import annotations

from typing import Callable

from maskrun.daemon.offline.reprocess import FrameSetResult, FrameSetTask, ReprocessError, process_frame_set


def _dask():
    try:
        import distributed
    except ImportError:
        raise ReprocessError(
            "--scheduler needs Dask: install it with  pip install 'maskrun[cluster]'  (dask[distributed])"
        ) from None
    return distributed


class DaskRunner:
    """Runs frame-set tasks on the Dask scheduler at ``address`` (e.g. ``tcp://10.0.0.5:8786``)."""

    def __init__(self, address: str, *, connect_timeout_s: float = 10.0):
        self.address = address
        self.connect_timeout_s = connect_timeout_s
        self.description = f"dask:{address}"

    def client(self):
        distributed = _dask()
        try:
            return distributed.Client(self.address, timeout=self.connect_timeout_s, set_as_default=False)
        except (OSError, TimeoutError) as exc:
            raise ReprocessError(
                f"cannot reach the Dask scheduler at {self.address} ({exc}); start one with  dask scheduler  "
                "and workers with  dask worker ADDRESS, or leave out --scheduler to use local processes"
            ) from None

    def run(self, tasks: list[FrameSetTask], on_done: Callable[[FrameSetResult], None],
            on_error: Callable[[FrameSetTask, BaseException], None]) -> None:
        distributed = _dask()
        client = self.client()
        try:
            # pure=False: every task runs (no key collisions between identical re-submissions)
            futures = client.map(process_frame_set, tasks, pure=False)
            by_key = {f.key: t for f, t in zip(futures, tasks)}
            for fut in distributed.as_completed(futures, loop=client.loop):
                try:
                    on_done(fut.result())
                except Exception as exc:
                    on_error(by_key[fut.key], exc)
        finally:
            client.close()
