"""Where independent work runs: this process, local worker processes, or a Dask cluster.

One engine layer for every job made of independent pieces (batch partitions,
bootstrap replicates): the caller decides *what* each piece computes and how it is
seeded; this module only decides *where* it runs and hands the results back in
the pieces' order.  Seeds therefore never depend on the engine or the number of
workers.

- ``Engine("local")`` with ``workers=1`` (the default) runs the pieces one after
  the other in this process; ``workers=N`` runs them in N worker processes
  (:mod:`concurrent.futures`, started with ``spawn``).
- ``Engine("dask")`` starts a ``distributed.LocalCluster`` on 127.0.0.1 with
  ``workers`` processes of one thread (default: one per core), or connects to
  ``scheduler`` (``tcp://HOST:PORT``).  Connecting and waiting for workers are
  bounded by ``timeout`` seconds; an unreachable scheduler or one without workers
  is an input error (exit code 2), never a hang.

Only the standard library and :mod:`pkcalc.errors` are imported here; dask is
imported when a Dask engine is used.
"""

from __future__ import annotations

import contextlib
import os
import time
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass
from typing import Any

from .errors import PkcalcInputError

__all__ = ["ENGINES", "Engine", "dask_client", "map_ordered"]

#: The engines a job can run on.
ENGINES = ("local", "dask")
#: Most worker processes pkcalc starts, whatever the machine.
MAX_WORKERS = 256
#: Memory a worker process may take (a bound for how many start; measured ~75 MB idle).
WORKER_MEMORY_MB = 250
#: Longest wait for a scheduler or its first worker, s.
MAX_TIMEOUT = 3600.0


def worker_limit() -> int:
    """How many worker processes this machine can run: two per core, and no more than
    its available memory holds at :data:`WORKER_MEMORY_MB` each (Linux), at most
    :data:`MAX_WORKERS`."""
    cores = os.cpu_count() or 1
    limit = min(MAX_WORKERS, 2 * cores)
    try:
        free_mb = os.sysconf("SC_AVPHYS_PAGES") * os.sysconf("SC_PAGE_SIZE") / 2**20
        limit = min(limit, max(1, int(free_mb // WORKER_MEMORY_MB)))
    except (ValueError, OSError, AttributeError):
        pass
    return max(1, limit)


@dataclass(frozen=True)
class Engine:
    """Where a job's independent pieces run.

    Attributes
    ----------
    kind : {"local", "dask"}
    workers : int or None
        Local: worker processes (None or 1: this process).  Dask: processes of the
        local cluster pkcalc starts (None: one per core); ignored with ``scheduler``.
    scheduler : str or None
        Address of a running Dask scheduler (``tcp://HOST:PORT``); Dask only.
    timeout : float
        Seconds allowed to reach the scheduler and to see its first worker (at most
        :data:`MAX_TIMEOUT`).
    """

    kind: str = "local"
    workers: int | None = None
    scheduler: str | None = None
    timeout: float = 20.0

    def __post_init__(self) -> None:
        if self.kind not in ENGINES:
            raise ValueError(f"kind: '{self.kind}' is not one of {', '.join(ENGINES)}")
        limit = worker_limit()
        if self.workers is not None and not (isinstance(self.workers, int)
                                             and not isinstance(self.workers, bool)
                                             and 1 <= self.workers <= limit):
            raise ValueError(f"workers: must be a whole number from 1 to {limit} on this "
                             f"machine (two per core, as memory allows)")
        if self.scheduler is not None and self.kind != "dask":
            raise ValueError("scheduler: only the dask engine connects to a scheduler")
        if not (isinstance(self.timeout, int | float) and 0 < self.timeout <= MAX_TIMEOUT):
            raise ValueError(f"timeout: must be a number of seconds from above 0 to "
                             f"{MAX_TIMEOUT:g}")
        if self.scheduler is not None and not (isinstance(self.scheduler, str)
                                               and self.scheduler.strip()):
            raise ValueError("scheduler: an empty address (leave it out to start a local "
                             "cluster)")

    @property
    def label(self) -> str:
        """The engine in words, e.g. ``"dask (scheduler tcp://10.0.0.5:8786)"``."""
        if self.kind == "local":
            n = self.workers or 1
            return "local" if n == 1 else f"local ({n} processes)"
        if self.scheduler:
            return f"dask (scheduler {self.scheduler})"
        return f"dask (local cluster, {self.workers or os.cpu_count() or 1} processes)"


def _connect(distributed, engine: Engine):
    """A client of the scheduler, within ``engine.timeout`` whatever the other end does
    (refuses, answers with other bytes, or accepts and never replies): the attempt runs
    in a daemon thread that is abandoned when the time is up."""
    import threading

    box: dict[str, Any] = {}

    def attempt() -> None:
        try:
            box["client"] = distributed.Client(engine.scheduler, timeout=f"{engine.timeout}s")
        except BaseException as exc:   # a garbled reply can raise anything (MemoryError)
            box["error"] = exc

    thread = threading.Thread(target=attempt, name="pkcalc-connect", daemon=True)
    thread.start()
    thread.join(engine.timeout + 2.0)
    if "client" in box:
        return box["client"]
    why = "no answer" if thread.is_alive() else box["error"].__class__.__name__
    raise PkcalcInputError(
        f"cannot reach the Dask scheduler at {engine.scheduler} within {engine.timeout:g} s "
        f"({why}; is it a Dask scheduler?)", field="--scheduler",
        expected="tcp://HOST:PORT of a running scheduler")


def _need_distributed():
    try:
        import distributed
    except ImportError:
        raise PkcalcInputError("the dask engine needs dask[distributed]",
                               expected="pip install 'pkcalc[dask]'") from None
    return distributed


@contextlib.contextmanager
def dask_client(engine: Engine) -> Iterator[Any]:
    """A ``distributed.Client`` for ``engine`` (a local cluster or the scheduler),
    closed (and the local cluster stopped) when the block ends."""
    distributed = _need_distributed()
    import logging

    cluster = None
    client = None
    try:
        if engine.scheduler:
            client = _connect(distributed, engine)
            try:
                client.wait_for_workers(1, timeout=engine.timeout)
            except (TimeoutError, OSError):
                raise PkcalcInputError(
                    f"the Dask scheduler at {engine.scheduler} has no workers "
                    f"(waited {engine.timeout:g} s)", field="--scheduler",
                    expected="workers started with 'dask worker ADDRESS'") from None
        else:
            import dask

            n = engine.workers or os.cpu_count() or 1
            # Dask starts workers with MALLOC_TRIM_THRESHOLD_ set, which makes every
            # large numpy array a fresh mmap (measured: the batch kernel ~15 % slower);
            # pkcalc's tasks hold bounded blocks, so the workers keep glibc's default
            environ = {k: v for k, v in
                       dask.config.get("distributed.nanny.pre-spawn-environ", {}).items()
                       if k != "MALLOC_TRIM_THRESHOLD_"}
            with dask.config.set({"distributed.nanny.pre-spawn-environ": environ}):
                cluster = distributed.LocalCluster(
                    n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1",
                    dashboard_address=":0", silence_logs=logging.ERROR)
            client = distributed.Client(cluster)
        yield client
    finally:
        if client is not None:
            with contextlib.suppress(Exception):
                client.close()
        if cluster is not None:
            with contextlib.suppress(Exception):
                cluster.close()


def watch_parent(parent: int) -> None:
    """In a worker process: end when the process that started it is gone (killed with
    SIGKILL, say), so that no worker outlives its run.  Linux asks the kernel to send
    SIGKILL on the parent's death; elsewhere a thread looks every second."""
    import signal
    import threading

    with contextlib.suppress(Exception):
        import ctypes

        libc = ctypes.CDLL("libc.so.6", use_errno=True)
        libc.prctl(1, int(signal.SIGKILL))          # PR_SET_PDEATHSIG
    if os.getppid() != parent:                       # gone before the request took effect
        os._exit(1)

    def look() -> None:
        while True:
            time.sleep(1.0)
            if os.getppid() != parent:
                os._exit(1)

    threading.Thread(target=look, name="pkcalc-parent-watch", daemon=True).start()
    # a worker ignores Ctrl-C: the parent decides and stops it
    signal.signal(signal.SIGINT, signal.SIG_IGN)


def _map_processes(fn, items: list, workers: int, progress, started: float) -> list:
    """The local process pool: results in order; Ctrl-C, SIGTERM or an error stop it at
    once (queued pieces cancelled, the workers terminated), never after every piece."""
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor, as_completed

    total = len(items)
    pool = ProcessPoolExecutor(max_workers=min(workers, max(total, 1)),
                               mp_context=multiprocessing.get_context("spawn"),
                               initializer=watch_parent, initargs=(os.getpid(),))
    try:
        futures = [pool.submit(fn, x) for x in items]
        for done, _ in enumerate(as_completed(futures), 1):
            _report(progress, done, total, started)
        out = [f.result() for f in futures]
    except BaseException:
        processes = list((getattr(pool, "_processes", None) or {}).values())
        pool.shutdown(wait=False, cancel_futures=True)
        for p in processes:
            with contextlib.suppress(Exception):
                p.terminate()
        for p in processes:
            with contextlib.suppress(Exception):
                p.join(5)
        raise
    pool.shutdown(wait=True)
    return out


def _report(progress: Callable[[int, int, float], None] | None, done: int, total: int,
            started: float) -> None:
    if progress is not None:
        progress(done, total, time.perf_counter() - started)


def map_ordered(fn: Callable[[Any], Any], items: Sequence[Any], engine: Engine | None = None,
                *, progress: Callable[[int, int, float], None] | None = None) -> list[Any]:
    """``[fn(x) for x in items]`` on ``engine``, results in the items' order.

    ``fn`` and the items must be picklable for worker processes (a module-level
    function or a :func:`functools.partial` of one).  ``progress(done, total,
    seconds)`` is called as pieces finish.  An exception raised by ``fn`` ends
    the job and is raised here; a piece that may fail on its own should return
    its failure instead.
    """
    engine = engine or Engine()
    items = list(items)
    total = len(items)
    started = time.perf_counter()
    if engine.kind == "local" and (engine.workers or 1) == 1:
        out = []
        for i, x in enumerate(items):
            out.append(fn(x))
            _report(progress, i + 1, total, started)
        return out
    if engine.kind == "local":
        return _map_processes(fn, items, engine.workers, progress, started)
    distributed = _need_distributed()
    with dask_client(engine) as client:
        futures = client.map(fn, items, pure=False)
        for done, _ in enumerate(distributed.as_completed(futures), 1):
            _report(progress, done, total, started)
        return client.gather(futures)
