"""Where the fit's passes run: in this process (the default) or on a Dask cluster.

Both engines execute the same plan (``fpca.plan``) over the same parts (one per data file)
and add the parts' sums in the same fixed order, so the results are bit-identical whichever
engine, scheduler or number of workers ran them. The engine is chosen on the command line,
outside the hashed spec; record.json names the one that ran.

Dask is optional (``pip install 'reportgen[dask]'``). Its scheduler is, in this order: the
address given (``--scheduler``), Dask's own ``DASK_SCHEDULER_ADDRESS`` setting, or a
cluster started in this process (threads as workers, one per core, no dashboard).
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any, TypeVar

from .errors import EngineError
from .fpca.plan import Executor, InProcess, Part, warm_up

T = TypeVar("T")
ENGINES = ("local", "dask")
CONNECT_TIMEOUT = "10s"


@dataclass(frozen=True)
class Engine:
    """An executor, how it places the parts, and what record.json says of it."""

    executor: Executor
    place: Callable[[list[Part]], Sequence[Any]]
    description: str


class OnDask:
    """Runs each pass as one task per part on a Dask cluster; results come back in the
    parts' order whatever order the tasks finish in."""

    def __init__(self, client: Any) -> None:
        """``client``: a connected ``distributed.Client``. Every worker loads the compiled
        kernels now, before the first pass."""
        self.client = client
        client.run(warm_up)

    def place(self, parts: list[Part]) -> list[Any]:
        return list(self.client.scatter(parts))

    def keep(self, fn: Callable[..., Any], parts: Sequence[Any],
             per_part: Sequence[tuple[Any, ...]] | None = None, shared: tuple[Any, ...] = ()
             ) -> list[Any]:
        extra = per_part if per_part is not None else [()] * len(parts)
        return [self.client.submit(fn, p, *e, *shared, pure=False)
                for p, e in zip(parts, extra, strict=True)]

    def map(self, fn: Callable[..., T], parts: Sequence[Any],
            per_part: Sequence[tuple[Any, ...]] | None = None, shared: tuple[Any, ...] = ()
            ) -> list[T]:
        return list(self.client.gather(self.keep(fn, parts, per_part, shared)))


def local_engine() -> Engine:
    """Every pass in this process, one part after another."""
    return Engine(InProcess(), list, "local")


@contextmanager
def open_engine(name: str = "local", scheduler: str | None = None) -> Iterator[Engine]:
    """The engine called ``name``, open for the duration of the block."""
    if name == "local":
        if scheduler:
            raise EngineError("--scheduler is for --engine dask")
        yield local_engine()
        return
    if name != "dask":
        raise EngineError(f"--engine must be one of {', '.join(ENGINES)}; got {name!r}")
    try:
        import dask
        from distributed import Client, LocalCluster
    except ImportError:
        raise EngineError("--engine dask needs Dask: pip install 'reportgen[dask]'") from None
    address = scheduler or dask.config.get("scheduler-address", None)
    if address:
        try:
            client = Client(address, timeout=CONNECT_TIMEOUT)
        except (OSError, TimeoutError) as e:
            where = "--scheduler" if scheduler else "DASK_SCHEDULER_ADDRESS"
            raise EngineError(f"cannot reach the Dask scheduler at {address!r} ({where}): "
                             f"{e}") from None
        try:
            n = len(client.scheduler_info(n_workers=-1).get("workers", {}))
            on = OnDask(client)
            yield Engine(on, on.place, f"dask (scheduler {address}, {n} workers)")
        finally:
            client.close()
        return
    workers = os.cpu_count() or 1
    with LocalCluster(n_workers=workers, threads_per_worker=1, processes=False,
                      dashboard_address=None) as cluster, Client(cluster) as client:
        on = OnDask(client)
        yield Engine(on, on.place, f"dask (a cluster in this process, {workers} workers)")
