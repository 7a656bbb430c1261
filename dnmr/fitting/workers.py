"""Worker processes of the fitting wing: one initialiser for every pool, BLAS on one thread, death with the
parent so that no orphan keeps computing or holds the caller's output open, and the tasks that any
:class:`concurrent.futures.Executor` can run (dnmr's own pool, threads, a Dask cluster).

A task carries what it needs (:func:`in_worker`); a large object that many tasks share (the global fit's
problem) travels once per worker process and is kept there under a random key (:class:`SharedPayload`).
"""
from __future__ import annotations

import collections
import concurrent.futures as futures
import contextlib
import os
import sys
import threading
import time
import uuid
from collections.abc import Callable, Sequence
from typing import Any

_BLAS_LIMIT = None
_LOCK = threading.Lock()
_PAYLOADS: collections.OrderedDict[str, Any] = collections.OrderedDict()
#: Shared payloads a worker process keeps (the most recently used; older ones are dropped).
PAYLOADS_KEPT = 2


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


def process_pool(workers: int) -> futures.ProcessPoolExecutor:
    """A pool of `workers` processes, each started by :func:`start_worker`."""
    return futures.ProcessPoolExecutor(max_workers=workers, initializer=start_worker, initargs=(os.getpid(),))


def start_worker(parent_pid: int) -> None:
    """Initialise a worker process: it dies with the process that started it (`parent_pid`) and BLAS
    runs on one thread for the life of the process."""
    die_with_parent(parent_pid)
    prepare_worker(parent_pid)


def prepare_worker(caller_pid: int) -> None:
    """Hold BLAS to one thread for the life of this process, once, unless it is the caller's own process
    (`caller_pid`; threads of the caller run inside its fit, which already holds BLAS to one thread), and drop
    the fonts inherited from the parent (:func:`forget_inherited_fonts`).

    Every task calls it, so a worker that dnmr did not start (a Dask worker, a pool of the user's) computes
    as dnmr's own workers do: the same numbers, without BLAS threads contending."""
    global _BLAS_LIMIT
    if os.getpid() == caller_pid:
        return
    with _LOCK:
        if _BLAS_LIMIT is None:
            _BLAS_LIMIT = single_threaded_blas()
            forget_inherited_fonts()


def forget_inherited_fonts() -> None:
    """Drop the fonts of the math-text layouts that a forked worker inherited from its parent.

    A font object reads its file through the open file that the parent and every forked worker share, with one
    read position: two processes drawing at once read each other's bytes and fail ("failed to load glyph").
    matplotlib empties its own font cache in a forked process, not that of its math-text layouts (the rates'
    "s^-1" on a fit figure), which a parent that drew figures before starting the workers passes on."""
    mathtext = sys.modules.get("matplotlib.mathtext")
    if mathtext is not None:
        mathtext.MathTextParser._parse_cached.cache_clear()


def in_worker(caller_pid: int, function: Callable, *args: Any) -> Any:
    """``function(*args)`` in a worker of any executor, prepared by :func:`prepare_worker`."""
    prepare_worker(caller_pid)
    return function(*args)


class PayloadMissing:
    """What a task returns when its worker does not hold the shared payload it was sent without."""


def with_payload(caller_pid: int, key: str, payload: Any, function: Callable, *args: Any) -> Any:
    """``function(payload, *args)`` in a worker of any executor; `payload` None means the one this process
    keeps under `key` (:class:`PayloadMissing` is returned when it keeps none).  A payload sent is kept
    under `key`, with at most :data:`PAYLOADS_KEPT` in a process."""
    prepare_worker(caller_pid)
    with _LOCK:
        if payload is None:
            payload = _PAYLOADS.get(key)
            if payload is None:
                return PayloadMissing
        else:
            _PAYLOADS[key] = payload
        _PAYLOADS.move_to_end(key)
        while len(_PAYLOADS) > PAYLOADS_KEPT:
            _PAYLOADS.popitem(last=False)
    return function(payload, *args)


class SharedPayload:
    """An object that many tasks on `executor` work on, sent to each worker process once (not with every
    task) and kept there under a random key; a task that lands on a worker without it is sent again with it.

    Parameters
    ----------
    value : object
        The payload (picklable when the executor runs in other processes).
    executor : concurrent.futures.Executor
        Where the tasks run.
    """

    def __init__(self, value: Any, executor: futures.Executor):
        self.value, self.executor = value, executor
        self.key = uuid.uuid4().hex
        self.caller = os.getpid()
        self.sent = False

    def map(self, function: Callable, calls: Sequence[tuple]) -> list:
        """``function(value, *args)`` for every tuple of `calls`, in order (the first round sends the payload
        with every task; later rounds only to workers that lack it)."""
        send = None if self.sent else self.value
        self.sent = True
        pending = [self.executor.submit(with_payload, self.caller, self.key, send, function, *a) for a in calls]
        out = [f.result() for f in pending]
        again = {i: self.executor.submit(with_payload, self.caller, self.key, self.value, function, *calls[i])
                 for i, r in enumerate(out) if r is PayloadMissing}
        for i, f in again.items():
            out[i] = f.result()
        return out

    def close(self) -> None:
        """Drop the payload from this process (threads of the caller keep it here; other processes drop it
        as newer payloads come)."""
        with _LOCK:
            _PAYLOADS.pop(self.key, None)


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
