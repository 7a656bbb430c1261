"""Worker processes of the fitting wing: one initialiser for every pool, BLAS on one thread, and death
with the parent so that no orphan keeps computing or holds the caller's output open."""
from __future__ import annotations

import concurrent.futures as futures
import contextlib
import os
import sys
import time
from typing import Any

_BLAS_LIMIT = None
_PAYLOAD: Any = None


def single_threaded_blas():
    """Limit BLAS (OpenBLAS, MKL) to one thread in this process, for as long as the returned object lives.

    The lineshape blocks are small matrices, where BLAS threads only contend: with them a series fit
    ran about twice as slowly on two cores, serially and in parallel alike (benchmarks/fit_speed.py).
    Uses threadpoolctl when it is installed; without it, BLAS keeps its own setting.
    """
    try:
        from threadpoolctl import threadpool_limits
    except ImportError:  # optional: only speed is lost
        return contextlib.nullcontext()
    return threadpool_limits(limits=1, user_api="blas")


def process_pool(workers: int, payload: Any = None) -> futures.ProcessPoolExecutor:
    """A pool of `workers` processes, each started by `start_worker` with `payload` (read back in the
    worker with `worker_payload`)."""
    return futures.ProcessPoolExecutor(max_workers=workers, initializer=start_worker,
                                       initargs=(os.getpid(), payload))


def start_worker(parent_pid: int, payload: Any = None) -> None:
    """Initialise a worker process: it dies with the process that started it (`parent_pid`), BLAS runs
    on one thread for the life of the process, and `payload` is kept for `worker_payload`."""
    global _BLAS_LIMIT, _PAYLOAD
    die_with_parent(parent_pid)
    _BLAS_LIMIT = single_threaded_blas()
    _PAYLOAD = payload


def worker_payload() -> Any:
    """What the pool handed this worker at start-up (None in the main process)."""
    return _PAYLOAD


def die_with_parent(parent_pid: int) -> None:
    """End this worker when its parent ends, so that no orphan goes on computing and holding the parent's
    stdout and stderr open (a caller reading them would wait for ever).

    On Linux the kernel sends SIGKILL on the parent's death (prctl PR_SET_PDEATHSIG); everywhere a
    watchdog thread also checks once a second that the parent is still the one that started us.
    """
    import signal
    import threading

    if sys.platform.startswith("linux"):
        try:
            import ctypes

            ctypes.CDLL(None, use_errno=True).prctl(1, int(signal.SIGKILL), 0, 0, 0)  # 1: PR_SET_PDEATHSIG
        except (OSError, AttributeError):  # no libc to call: the watchdog alone
            pass
    if os.getppid() != parent_pid:  # the parent ended before the request above took effect
        os._exit(1)

    def watch() -> None:
        while os.getppid() == parent_pid:
            time.sleep(1.0)
        os._exit(1)

    threading.Thread(target=watch, name="dnmr-parent-watchdog", daemon=True).start()
