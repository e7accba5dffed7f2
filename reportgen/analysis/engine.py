"""Where the fit's passes run: in this process (the default) or on a Dask cluster.

Both engines execute the same plan (``fpca.plan``) over the same parts (one per data file)
and add the parts' sums in the same fixed order, so the results are bit-identical whichever
engine, scheduler or number of workers ran them. The engine is chosen on the command line,
outside the hashed spec; record.json names the one that ran.

Dask is optional (``pip install 'reportgen[dask]'``). Its scheduler is, in this order: the
address given (``--scheduler``), Dask's own ``DASK_SCHEDULER_ADDRESS`` setting, or a
cluster started in this process (threads as workers, one per core; its HTTP server on a
free port).
"""

from __future__ import annotations

import logging
import os
import time
from collections.abc import Callable, Iterator, Sequence
from concurrent.futures import CancelledError
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any, TypeVar

from .._version import __version__
from ..errors import EngineError
from ..fpca.executor import Executor, InProcess
from ..fpca.plan import Part, warm_up

T = TypeVar("T")
ENGINES = ("local", "dask")
CONNECT_TIMEOUT = "10s"
WAIT_FOR_WORKERS = 10.0  # seconds
# A pass whose cluster has had no worker for this long stops the run: the tasks would wait
# for a worker forever. Long enough for a worker's restart by its nanny or by a
# cluster manager; a pass with workers is never timed out, however long it takes.
LOST_AFTER = 60.0  # seconds
_POLL = 1.0  # seconds between looks at the cluster while a pass waits


@dataclass(frozen=True)
class Engine:
    """An executor and what record.json says of it."""

    executor: Executor
    description: str


class OnDask:
    """Runs each pass as one task per part on a Dask cluster; results come back in the
    parts' order whatever order the tasks finish in."""

    def __init__(self, client: Any) -> None:
        """``client``: a connected ``distributed.Client``. Every worker loads the compiled
        kernels now, before the first pass, and must run the versions that this process
        runs (the same bits need the same code)."""
        self.client = client
        try:
            found = client.run(prepare_worker)
        except Exception as e:  # a worker without reportgen fails to unpickle the task
            raise EngineError(
                f"the Dask workers cannot run reportgen's tasks "
                f"({type(e).__name__}: {e}); install reportgen {__version__} "
                "on every worker"
            ) from None
        check_versions(found, versions())

    def place(self, parts: list[Part]) -> list[Any]:
        with _cluster_failures(self.client):
            if not self.client.scheduler_info(n_workers=-1).get("workers"):
                try:  # scatter fails at once when no worker is there to hold the parts
                    self.client.wait_for_workers(1, timeout=LOST_AFTER)
                except TimeoutError:
                    raise _lost() from None
            # hash=False: the parts need no content key, and hashing them costs more than
            # sending them
            return list(self.client.scatter(parts, hash=False))

    def keep(
        self,
        fn: Callable[..., Any],
        parts: Sequence[Any],
        per_part: Sequence[tuple[Any, ...]] | None = None,
        shared: tuple[Any, ...] = (),
    ) -> list[Any]:
        extra = per_part if per_part is not None else [()] * len(parts)
        return [
            self.client.submit(fn, p, *e, *shared, pure=False)
            for p, e in zip(parts, extra, strict=True)
        ]

    def map(
        self,
        fn: Callable[..., T],
        parts: Sequence[Any],
        per_part: Sequence[tuple[Any, ...]] | None = None,
        shared: tuple[Any, ...] = (),
    ) -> list[T]:
        with _cluster_failures(self.client):
            futures = self.keep(fn, parts, per_part, shared)
            self._wait(futures)
            return list(self.client.gather(futures))

    def _wait(self, futures: list[Any]) -> None:
        """Wait for ``futures``; raise EngineError once the cluster has had no worker for
        ``LOST_AFTER`` seconds (the scheduler keeps such tasks waiting, without an error)."""
        from distributed import wait

        alone_since: float | None = None
        while True:
            try:
                wait(futures, timeout=_POLL)
                return
            except TimeoutError:
                pass
            if self.client.scheduler_info(n_workers=-1).get("workers"):
                alone_since = None
                continue
            now = time.monotonic()
            alone_since = now if alone_since is None else alone_since
            if now - alone_since >= LOST_AFTER:
                raise _lost()


def _lost() -> EngineError:
    return EngineError(
        f"the Dask cluster lost its workers: none for {LOST_AFTER:g} s while the run "
        "waited; nothing was written"
    )


_SCHEDULER_LOST = (
    "the Dask cluster failed during the run: the connection to the scheduler was lost; "
    "nothing was written"
)


@contextmanager
def _cluster_failures(client: Any = None) -> Iterator[None]:
    """A cluster's failure as EngineError, raised where it happens: the run around it
    must not take a lost connection (an OSError) for a failure to write its files."""
    from distributed import KilledWorker

    try:
        yield
    except CancelledError:  # Dask cancels every task when the scheduler is gone
        raise EngineError(_SCHEDULER_LOST) from None
    except RuntimeError:  # a client that gave up on its scheduler has closed its connections
        if client is None or client.status == "running":
            raise
        raise EngineError(_SCHEDULER_LOST) from None
    except (KilledWorker, OSError) as e:  # CommClosedError and TimeoutError are OSErrors
        raise EngineError(
            f"the Dask cluster failed during the run ({type(e).__name__}: {e}); nothing was written"
        ) from None


def versions() -> dict[str, str]:
    """The versions of the code that runs the passes (pandas and pyarrow: the workers make
    the Parquet parts of the tables of subjects, whose bytes name the writer)."""
    import numba
    import numpy
    import pandas
    import pyarrow

    return {
        "reportgen": __version__,
        "numpy": numpy.__version__,
        "numba": numba.__version__,
        "pandas": pandas.__version__,
        "pyarrow": pyarrow.__version__,
    }


def prepare_worker() -> dict[str, str]:
    """Run on each worker when the engine opens: load the kernels, report the versions."""
    warm_up()
    return versions()


def check_versions(found: dict[str, dict[str, str]], here: dict[str, str]) -> None:
    """Refuse workers whose reportgen, numpy, numba, pandas or pyarrow differ from this
    process's."""
    for worker, versions in sorted(found.items()):
        differ = [
            f"{name} {versions.get(name)} (here {v})"
            for name, v in here.items()
            if versions.get(name) != v
        ]
        if differ:
            raise EngineError(
                f"Dask worker {worker} runs {', '.join(differ)}: every worker "
                "needs the versions of this process, or the results could "
                "differ"
            )


def local_engine() -> Engine:
    """Every pass in this process, one part after another."""
    return Engine(InProcess(), "local")


@contextmanager
def open_engine(name: str = "local", scheduler: str | None = None) -> Iterator[Engine]:
    """The engine called ``name``, open for the duration of the block.

    A Dask cluster that fails during the block (a task's worker killed too often, every
    worker gone for ``LOST_AFTER`` seconds, the scheduler gone) raises EngineError; the run
    writes nothing then.
    """
    if name == "local":
        if scheduler:
            raise EngineError("--scheduler is for --engine dask")
        yield local_engine()
        return
    if name != "dask":
        raise EngineError(f"--engine must be one of {', '.join(ENGINES)}; got {name!r}")
    try:
        import dask
        from distributed import Client, KilledWorker, LocalCluster
    except ImportError:
        raise EngineError("--engine dask needs Dask: pip install 'reportgen[dask]'") from None
    address = scheduler or dask.config.get("scheduler-address", None)
    # The client logs its lost scheduler as an error of its own; the run says it in one line.
    client_log = logging.getLogger("distributed.client")
    level = client_log.level
    client_log.setLevel(logging.CRITICAL)
    try:
        if address:
            with _connected(
                Client, address, "--scheduler" if scheduler else "DASK_SCHEDULER_ADDRESS"
            ) as (client, n):
                on = OnDask(client)
                yield Engine(on, f"dask (scheduler {address}, {n} workers)")
            return
        workers = os.cpu_count() or 1
        with (
            LocalCluster(
                n_workers=workers, threads_per_worker=1, processes=False, dashboard_address=":0"
            ) as cluster,
            Client(cluster) as client,
        ):
            on = OnDask(client)
            yield Engine(on, f"dask (a cluster in this process, {workers} workers)")
    except (CancelledError, KilledWorker, OSError):
        with _cluster_failures():
            raise
    finally:
        client_log.setLevel(level)


@contextmanager
def _connected(client_type: Any, address: str, named_by: str) -> Iterator[tuple[Any, int]]:
    """A client of the scheduler at ``address`` that has at least one worker."""
    try:
        client = client_type(address, timeout=CONNECT_TIMEOUT)
    except (OSError, TimeoutError) as e:
        raise EngineError(
            f"cannot reach the Dask scheduler at {address!r} ({named_by}): {e}"
        ) from None
    try:
        try:
            client.wait_for_workers(1, timeout=WAIT_FOR_WORKERS)
        except TimeoutError:
            raise EngineError(
                f"the Dask scheduler at {address!r} ({named_by}) has no workers "
                f"(waited {WAIT_FOR_WORKERS:g} s); start some with "
                f"`dask worker {address}`"
            ) from None
        yield client, len(client.scheduler_info(n_workers=-1).get("workers", {}))
    finally:
        client.close()
