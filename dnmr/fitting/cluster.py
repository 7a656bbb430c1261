"""Sending the work of a fit to a running Dask distributed scheduler, by its address.

Dask is an optional extra (``pip install "dnmr-exchange[dask]"``, the ``distributed`` package).  The
scheduler's workers need dnmr, the same version as here, but not the input files: the fits read the
spectra here and send them with the tasks (:mod:`dnmr.fitting.runner`).  Any other
:class:`concurrent.futures.Executor` can be given to the API directly.
"""
from __future__ import annotations

import concurrent.futures as futures
import socket
from collections.abc import Iterator
from contextlib import contextmanager

from dnmr.errors import InputError

#: Seconds to wait for the scheduler to answer before giving up.
CONNECT_TIMEOUT_S = 10.0
EXTRA_HINT = 'install the optional extra: pip install "dnmr-exchange[dask]"'


def dnmr_version() -> str:
    """The version of dnmr where this runs (on a Dask worker: whether it has dnmr, and which)."""
    from dnmr import __version__

    return __version__


@contextmanager
def scheduler_executor(address: str, where: str = "--scheduler",
                       timeout_s: float = CONNECT_TIMEOUT_S) -> Iterator[tuple[futures.Executor, int]]:
    """Connect to the Dask scheduler at `address` for the life of the block.

    Parameters
    ----------
    address : str
        The scheduler's address (``tcp://host:8786``, or ``host:8786``).
    where : str
        The option the address came from (named in errors).
    timeout_s : float
        Seconds to wait for the scheduler (s).

    Yields
    ------
    executor : concurrent.futures.Executor
        Runs tasks on the scheduler's workers (each task computed afresh, never taken from a cache).
    threads : int
        Worker threads of the cluster: how many tasks can run at once.

    Raises
    ------
    InputError
        ``distributed`` is not installed, the scheduler cannot be reached, it has no workers, or they lack
        this version of dnmr.
    """
    try:
        from distributed import Client
    except ImportError:
        raise InputError(f"sending work to a Dask scheduler needs the distributed package; {EXTRA_HINT}",
                         where=where) from None
    _check_reachable(address, where, timeout_s)
    try:
        client = Client(address, timeout=timeout_s, set_as_default=False)
    except (OSError, ValueError) as err:
        raise InputError(f"cannot reach the Dask scheduler at {address} ({err}); start it or check the address",
                         where=where) from None
    try:
        threads = sum(client.nthreads().values())
        if threads == 0:
            raise InputError(f"the Dask scheduler at {address} has no workers; start some (dask worker {address})",
                             where=where)
        _check_versions(client, address, where)
        yield client.get_executor(pure=False), threads
    finally:
        client.close()


def _check_reachable(address: str, where: str, timeout_s: float) -> None:
    """Refuse a malformed address, and a TCP address where nothing listens, before any client is made."""
    from distributed.comm.addressing import parse_address, parse_host_port

    try:
        scheme, location = parse_address(address if "://" in address else "tcp://" + address)
        if scheme != "tcp":
            return
        host, port = parse_host_port(location)
    except ValueError as err:
        raise InputError(f"{address!r} is not a scheduler address ({err}); give it as tcp://host:8786",
                         where=where) from None
    try:
        socket.create_connection((host, int(port)), timeout=timeout_s).close()
    except OSError as err:
        raise InputError(f"cannot reach the Dask scheduler at {address} ({err.strerror or err}); start it "
                         "(dask scheduler) or check the address", where=where) from None


def _check_versions(client, address: str, where: str) -> None:
    """Refuse workers without dnmr, or with another version of it (their numbers could differ)."""
    here = dnmr_version()
    try:
        theirs = set(client.run(dnmr_version).values())
    except Exception as err:  # the workers cannot even import dnmr
        raise InputError(f"the workers of the Dask scheduler at {address} cannot run dnmr ({type(err).__name__}: "
                         f"{err}); install dnmr-exchange {here} on them", where=where) from None
    if theirs != {here}:
        raise InputError(f"the workers of the Dask scheduler at {address} have dnmr {', '.join(sorted(theirs))}, "
                         f"not {here}; install the same version on them", where=where)
