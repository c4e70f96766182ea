"""Where work runs: in-process, a local pool of processes, or a Dask cluster.

Every choice is a standard :class:`concurrent.futures.Executor` (``submit`` returns a
``concurrent.futures.Future``), so the search and the multi-spec driver do not know
which one they were given:

- :class:`InlineExecutor` runs each call at once in the calling process (one spec,
  nothing changes for a single-loop user).
- :func:`local_pool` is a :class:`concurrent.futures.ProcessPoolExecutor` sized to
  the cores. Chosen over ``distributed.LocalCluster`` because it needs no scheduler
  process, no network ports and starts in milliseconds (fork); on one machine the
  only thing Dask would add is its worker-death recovery, and a local run whose
  process dies is resumed from its run folder instead.
- :func:`connect` returns a Dask executor on a running scheduler
  (``distributed.Client(address).get_executor(retries=...)``): the scheduler moves
  the tasks of a worker that dies to the other workers, and ``retries`` re-runs a
  task that raised on a worker (Dask's own fault handling, nothing home-made).

Tasks are pure functions of their arguments and return values; they never touch
storage, so a task run twice (after a worker death) changes nothing.

Security: a Dask scheduler runs whatever its clients send it. Run it only on a
trusted network; every example here listens on the loopback address 127.0.0.1.
"""

from __future__ import annotations

import concurrent.futures as cf
import logging
import os
from concurrent.futures.process import BrokenProcessPool

ENV_VAR = "SYNTH_CLUSTER"
CONNECT_TIMEOUT_S = 10.0
TASK_RETRIES = 2          # re-runs of a task that raised on a worker (worker deaths are handled by the scheduler)


class ClusterError(Exception):
    """The place where work runs failed (scheduler unreachable or lost, pool broken); user-facing."""


class InlineExecutor(cf.Executor):
    """Runs each submitted call immediately in the calling thread (the in-process default)."""

    def submit(self, fn, /, *args, **kwargs):
        f = cf.Future()
        try:
            f.set_result(fn(*args, **kwargs))
        except BaseException as e:   # delivered through the future, as every executor does
            f.set_exception(e)
        return f


def cores() -> int:
    """Cores this process may use (the CPU affinity mask, not the machine's total)."""
    try:
        return max(len(os.sched_getaffinity(0)), 1)
    except AttributeError:   # not on Linux
        return max(os.cpu_count() or 1, 1)


def local_pool(tasks: int | None = None) -> cf.ProcessPoolExecutor:
    """A process pool with one process per core (fewer when there are fewer tasks)."""
    n = cores() if tasks is None else max(1, min(cores(), int(tasks)))
    return cf.ProcessPoolExecutor(max_workers=n)


def cluster_address(option: str | None) -> str | None:
    """The scheduler address: the ``--cluster`` option, else ``$SYNTH_CLUSTER``, else None (local)."""
    addr = option if option else os.environ.get(ENV_VAR, "").strip()
    return addr or None


class DaskExecutor(cf.Executor):
    """A Dask ``ClientExecutor`` that owns its client: ``shutdown`` also closes the client."""

    def __init__(self, client, retries: int = TASK_RETRIES):
        self.client = client
        self.address = client.scheduler.address
        self._inner = client.get_executor(retries=retries, pure=False)

    def submit(self, fn, /, *args, **kwargs):
        return self._inner.submit(fn, *args, **kwargs)

    def workers(self) -> int:
        return len(self.client.scheduler_info().get("workers", {}))

    def shutdown(self, wait=True, *, cancel_futures=False):
        try:
            self._inner.shutdown(wait=wait and not cancel_futures)
        except Exception:   # a lost scheduler: nothing left to wait for
            pass
        try:
            self.client.close(timeout=2)
        except Exception:
            pass


def connect(address: str, timeout: float | None = None) -> DaskExecutor:
    """Connect to the Dask scheduler at ``address`` (e.g. ``tcp://127.0.0.1:8786``).

    Raises :class:`ClusterError` naming the address when it cannot be reached or has
    no workers within ``timeout`` seconds (default CONNECT_TIMEOUT_S).
    """
    timeout = CONNECT_TIMEOUT_S if timeout is None else timeout
    try:
        from distributed import Client
    except ImportError:   # pragma: no cover - a dependency of synth
        raise ClusterError("--cluster: the 'distributed' package is not installed; "
                           "expected pip install distributed") from None
    quiet()
    try:
        client = Client(address, timeout=timeout, set_as_default=False)
    except (OSError, TimeoutError, ValueError) as e:
        raise ClusterError(f"--cluster {address}: cannot reach a Dask scheduler there ({_short(e)}); "
                           "expected the address of a running 'dask scheduler', e.g. tcp://127.0.0.1:8786") from None
    try:
        client.wait_for_workers(1, timeout=timeout)
    except (OSError, TimeoutError) as e:
        client.close()
        raise ClusterError(f"--cluster {address}: the scheduler has no workers after {timeout:g} s ({_short(e)}); "
                           "expected at least one 'dask worker' connected to it") from None
    return DaskExecutor(client)


def quiet() -> None:
    """Silence Dask's client-side log lines: failures reach the user as one ClusterError message."""
    for name in ("distributed", "distributed.client", "distributed.core", "distributed.comm"):
        logging.getLogger(name).setLevel(logging.CRITICAL)


def is_infrastructure_failure(exc: BaseException) -> bool:
    """True for failures of the executor itself (lost scheduler, broken pool, task killing
    its workers), as opposed to an exception raised by the task's own code."""
    if isinstance(exc, (cf.CancelledError, BrokenProcessPool, ConnectionError)):
        return True
    try:
        from distributed.comm.core import CommClosedError
        from distributed.scheduler import KilledWorker
    except ImportError:   # pragma: no cover
        return False
    return isinstance(exc, (CommClosedError, KilledWorker))


def failure_message(exc: BaseException, where: str) -> str:
    """One user-facing sentence for an infrastructure failure of ``where`` (an address or 'local pool')."""
    if isinstance(exc, BrokenProcessPool):
        return f"{where}: a worker process died ({_short(exc)})"
    name = type(exc).__name__
    if name == "KilledWorker":
        return f"{where}: a task was running on every worker that died ({_short(exc)}); check the workers' memory"
    return f"{where}: lost the connection to the Dask scheduler ({name})"


def _short(e: BaseException) -> str:
    text = str(e).strip().splitlines()
    return (text[0][:160] if text else type(e).__name__)
