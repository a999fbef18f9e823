"""BLAS held to one thread while artifactclean computes.

OpenBLAS (numpy's and scipy's) runs a call on as many threads as the
machine has cores. The calls here are small (a block plan's pulse fit solves
a 641 x 49 least-squares problem per channel: 0.8 ms alone) and run beside
threads of their own (the channel groups, the input's checksum): a call
that waits for a core another thread holds took 13 ms in a file run.
Holding BLAS to one thread while cleaning made file runs 3-6% faster on one
worker and 5-15% on two (session 35, 8-channel files at 20 Hz), and the
result no longer depends on the machine's core count: OpenBLAS splits some
reductions between its threads, and the template's output with a DAC
differed in its last bits between one BLAS thread and two.

The limit is process-wide (:func:`threadpoolctl.threadpool_limits`) and
set by the main thread only: the first computation it enters sets it and
the last it leaves restores it, and the worker threads that clean channel
groups meanwhile run under it. OpenBLAS takes a larger thread count only
from the main thread (a restore from a worker thread left it at one), so a
computation entered on another thread alone changes nothing; dask's worker
processes run BLAS on one thread anyway (their nanny sets
``OPENBLAS_NUM_THREADS=1``). Other code's BLAS calls in the process run on
one thread too while the limit is set.
"""

from __future__ import annotations

import threading
from contextlib import ContextDecorator

from threadpoolctl import threadpool_limits

__all__ = ["one_blas_thread"]

# touched by the main thread only
_users = 0
_limits = None


class _OneBlasThread(ContextDecorator):
    """Context manager (and decorator): BLAS on one thread while the main thread is inside one (or more)."""

    def __enter__(self):
        global _users, _limits
        if threading.current_thread() is threading.main_thread():
            if _users == 0:
                _limits = threadpool_limits(limits=1, user_api="blas")
            _users += 1
        return self

    def __exit__(self, *exc):
        global _users, _limits
        if threading.current_thread() is threading.main_thread():
            _users -= 1
            if _users == 0:
                _limits.restore_original_limits()
                _limits = None
        return False


one_blas_thread = _OneBlasThread()
