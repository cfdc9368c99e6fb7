"""One ensemble on a running Dask cluster, and the runner a command opens.

Every chunk of trajectories becomes one Dask task, ``reduce_chunk(plan, chunk)``
(:func:`grmc.chunk.reduce_chunk`, a pure top-level function); the plan is sent once, as the
result of a small task of its own, so a worker that is lost with it gets it back by
recomputation, and so do the chunks it was running: Dask reschedules them on other
workers.  A process worker loads the compiled engine from its own numba cache on its first
chunk.  Results are gathered as they finish (the progress bar follows them) and folded in
chunk order by :class:`grmc.runner.ChunkRunner`, so the data equal a local run's with the
same seed, whatever the cluster and whichever workers were lost.

:func:`open_runner` is what a command (``grmc run``, and any other that simulates an
ensemble) uses: it connects to the scheduler, if any, within a timeout, and returns the
runner that keeps parts beside the output file.
"""

from __future__ import annotations

import logging
import os
from collections.abc import Iterator, Sequence
from contextlib import contextmanager

from .accumulators import Accumulators
from .chunk import reduce_chunk
from .plan import Plan
from .runner import ChunkRunner, Threads

__all__ = ["CONNECT_TIMEOUT_S", "SchedulerUnreachable", "BadSchedulerAddress", "Cluster",
           "connect", "open_runner"]

#: Seconds allowed to reach a scheduler before giving up.
CONNECT_TIMEOUT_S = 5.0


class SchedulerUnreachable(ConnectionError):
    """No Dask scheduler answered at the address within the timeout."""


class BadSchedulerAddress(ValueError):
    """An address Dask cannot read (e.g. a missing port)."""


def _the_plan(plan: Plan) -> Plan:
    """A task whose result is the plan (recomputed if the worker holding it is lost)."""
    return plan


@contextmanager
def _quiet_dask():
    """Keep Dask's connection retries and shutdown notices off the terminal."""
    loggers = [logging.getLogger(n) for n in ("distributed", "distributed.client",
                                               "distributed.comm", "distributed.core",
                                               "distributed.batched")]
    levels = [lg.level for lg in loggers]
    for lg in loggers:
        lg.setLevel(logging.CRITICAL)
    try:
        yield
    finally:
        for lg, level in zip(loggers, levels):
            lg.setLevel(level)


def connect(address: str, *, timeout_s: float = CONNECT_TIMEOUT_S):
    """A Dask client of the scheduler at ``address`` (e.g. ``tcp://10.0.0.5:8786``).

    Parameters
    ----------
    address : str  Scheduler address
    timeout_s : float  Time allowed to connect [s]

    Returns
    -------
    distributed.Client

    Raises
    ------
    BadSchedulerAddress
        The address is not one Dask reads.
    SchedulerUnreachable
        Nothing answered within ``timeout_s``.
    """
    import asyncio

    from dask.distributed import Client

    scheme = _probe(address, timeout_s)
    try:
        with _quiet_dask():
            if scheme == "tcp":  # a Dask handshake first: a client that fails lingers
                asyncio.run(_handshake(address, timeout_s))
            return Client(address, timeout=timeout_s, set_as_default=False)
    except (OSError, TimeoutError) as exc:
        raise _unreachable(address, timeout_s, exc) from None
    except Exception:  # e.g. another kind of server on that port
        raise SchedulerUnreachable(f"something answered at {address}, but not as a Dask "
                                   "scheduler") from None


def _unreachable(address: str, timeout_s: float, exc: BaseException) -> SchedulerUnreachable:
    return SchedulerUnreachable(f"no Dask scheduler answered at {address} "
                                f"({_first_line(exc)}; waited at most {timeout_s:g} s)")


async def _handshake(address: str, timeout_s: float) -> None:
    """Open and close one Dask connection (its handshake proves a Dask peer answers)."""
    from distributed.comm import connect as comm_connect

    comm = await comm_connect(address, timeout=timeout_s)
    await comm.close()


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip()
    return text.splitlines()[0] if text else type(exc).__name__


def _probe(address: str, timeout_s: float) -> str:
    """Check the address and, for TCP and TLS, that something listens there, before a
    client is made (a refused port fails at once, a silent host after ``timeout_s``)."""
    import socket

    from distributed.comm import parse_address, parse_host_port

    try:
        scheme, location = parse_address(address)
        if scheme not in ("tcp", "tls"):
            return scheme
        host, port = parse_host_port(location)
    except (ValueError, TypeError) as exc:
        raise BadSchedulerAddress(f"{address!r} is not a scheduler address such as "
                                  f"tcp://10.0.0.5:8786 ({_first_line(exc)})") from None
    try:
        socket.create_connection((host, port), timeout=timeout_s).close()
    except OSError as exc:
        raise _unreachable(address, timeout_s, exc) from None
    return scheme


class Cluster:
    """Chunks reduced as tasks on the workers of a Dask client.

    Parameters
    ----------
    client : distributed.Client
    own : bool  Close the client with :meth:`close`
    """

    def __init__(self, client, *, own: bool = False):
        self.client = client
        self.own = own

    def reduce(self, plan: Plan, items: Sequence[tuple[int, range]],
               tick) -> Iterator[tuple[int, Accumulators]]:
        """Yield ``(position, accumulators)`` of every chunk as its task finishes.

        On an interruption (or when the consumer stops) the remaining tasks are cancelled.
        """
        from dask.distributed import as_completed

        if not items:
            return
        units = plan.slices.units
        client = self.client
        plan_f = client.submit(_the_plan, plan, pure=False)
        futures = {client.submit(reduce_chunk, plan_f, chunk, pure=False): (k, chunk)
                   for k, chunk in items}
        try:
            for fut in as_completed(futures, loop=client.loop):
                k, chunk = futures.pop(fut)
                part = fut.result()
                fut.release()
                tick(len(chunk) * units)
                yield k, part
        finally:
            if futures:
                with _quiet_dask():
                    client.cancel(list(futures))
            plan_f.release()

    def close(self) -> None:
        """Close the client if this object opened it (the cluster keeps running)."""
        if self.own:
            with _quiet_dask():
                self.client.close()


@contextmanager
def open_runner(out: str | os.PathLike[str] | None, *, scheduler: str | None = None,
                resume: bool = False, workers: int | None = None,
                timeout_s: float = CONNECT_TIMEOUT_S) -> Iterator[ChunkRunner]:
    """The chunk runner of one command: local threads or a cluster, parts beside ``out``.

    Parameters
    ----------
    out : path or None  Output file (None: keep no parts)
    scheduler : str, optional  Address of a running Dask scheduler; default this
        machine's threads
    resume : bool  Take the chunks an interrupted run of the same plan kept
    workers : int, optional  Local threads (ignored with a scheduler)
    timeout_s : float  Time allowed to reach the scheduler [s]

    Yields
    ------
    ChunkRunner  Pass it as ``runner=`` to :func:`grmc.simulate.run`; call
    ``runner.finish()`` once the output file is written (removes the parts)

    Raises
    ------
    SchedulerUnreachable
        Before anything is planned, simulated or written.
    """
    backend = (Cluster(connect(scheduler, timeout_s=timeout_s), own=True) if scheduler
               else Threads(workers))
    runner = ChunkRunner(backend, out=out, resume=resume)
    try:
        yield runner
    finally:
        runner.close()
