"""Where fold work runs: in this process, in joblib worker processes, or on a Dask cluster.

Cross-fitting is a list of independent learner fits (K folds times one classifier, the nested
scheme's pair fits, one regression per choice and target, the renewal-robust projections). A
:class:`Backend` runs such a list of tasks and returns the results in submission order:

``"sequential"``
    one task after another in this process (the default);
``"joblib"``
    ``n_jobs`` worker processes on this machine (joblib's process pool);
``"dask"``
    the workers of a Dask cluster, through ``dask.distributed``: pass a ``Client``, the
    address of a running scheduler (``"tcp://host:8786"``), or ``"dask"`` for the client
    already created in this session.

Numbers do not depend on the backend. Every learner's seed is drawn from the run's generator,
in a fixed order, before any task is submitted, every task trains on the same rows in the same
order, and results are put back in submission order.

Data. The feature matrix is shared once per session, never copied per task: as is in this
process, as a read-only memory-mapped file for joblib workers, scattered once to every Dask
worker. A task carries only index arrays (its training and prediction rows, and columns) and
gathers its rows itself, in the learner's dtype (:func:`take_rows`).

Threads. Parallel workers never run multi-threaded learners on the same cores: a learner's
thread count (``n_jobs`` / ``num_threads``) is capped at the cores of its machine divided by
the tasks that run there at once (``cores // n_jobs`` for joblib; for Dask, the cores a worker
sees divided by the worker threads on its host). The sequential backend leaves the learners'
own settings alone.
"""

from __future__ import annotations

import os
import shutil
import tempfile
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from ._errors import InputError
from ._options import check_option

__all__ = [
    "BACKENDS",
    "Backend",
    "FeatureRows",
    "Session",
    "limit_threads",
    "resolve_backend",
    "take_rows",
]

BACKENDS = ("sequential", "joblib", "dask")

# Rows are gathered (and cast) in blocks of about this many bytes of the source matrix, so
# casting to float32 never holds a float64 copy of the training rows.
_BLOCK_BYTES = 32 * 2**20
_ADDRESS_PREFIXES = ("tcp://", "tls://", "inproc://", "ucx://", "ws://", "wss://")
_THREAD_KEYS = ("n_jobs", "num_threads", "nthread")

# A task function: (shared matrix, task, learner threads or None) -> (result, fit s, predict s).
TaskFunction = Callable[[np.ndarray, Any, "int | None"], "tuple[Any, float, float]"]


# --------------------------------------------------------------------------- shared features
@dataclass(frozen=True)
class FeatureRows:
    """Rows and columns of a feature matrix, named by index arrays instead of copied.

    Parameters
    ----------
    base : numpy.ndarray
        (n, p) matrix, e.g. :attr:`Panel.features <orthoccp.Panel.features>`.
    rows : numpy.ndarray, optional
        Positions in ``base`` of the rows meant (all rows when omitted).
    cols : numpy.ndarray, optional
        Columns of ``base`` meant (all columns when omitted).
    """

    base: np.ndarray
    rows: np.ndarray | None = None
    cols: np.ndarray | None = None

    @property
    def n_rows(self) -> int:
        return int(self.base.shape[0] if self.rows is None else self.rows.shape[0])

    def base_rows(self, positions: np.ndarray) -> np.ndarray:
        """Positions in ``base`` of the view's rows ``positions``."""
        return positions if self.rows is None else self.rows[positions]


def take_rows(
    base: np.ndarray, rows: np.ndarray, cols: np.ndarray | None, dtype: np.dtype[Any] | type
) -> np.ndarray:
    """``base[rows][:, cols]`` as a C-contiguous array of ``dtype``, gathered block by block.

    A float64 matrix cast to float32 this way never holds a float64 copy of the rows.
    """
    dtype = np.dtype(dtype)
    if cols is None and base.dtype == dtype:
        return np.ascontiguousarray(np.take(base, rows, axis=0))
    n_cols = base.shape[1] if cols is None else int(np.asarray(cols).size)
    out = np.empty((rows.size, n_cols), dtype=dtype)
    step = max(1, _BLOCK_BYTES // max(1, base.shape[1] * base.dtype.itemsize))
    for start in range(0, rows.size, step):
        block = rows[start : start + step]
        out[start : start + step] = base[block] if cols is None else base[np.ix_(block, cols)]
    return out


# --------------------------------------------------------------------------- threads
def _cores() -> int:
    """Cores this process may run on."""
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):  # not on Linux
        return os.cpu_count() or 1


def limit_threads(est: Any, threads: int | None) -> Any:
    """Cap the thread count of ``est`` (and of its pipeline steps) at ``threads``, in place.

    ``n_jobs``, ``num_threads`` and ``nthread`` parameters that ask for all cores (-1, 0, or
    ``None`` for a LightGBM model) or for more than ``threads`` are set to ``threads``; the
    fitted numbers do not depend on them. ``threads=None`` leaves ``est`` alone.
    """
    if threads is None or not hasattr(est, "get_params"):
        return est
    params = est.get_params(deep=True)
    updates: dict[str, int] = {}
    for key, value in params.items():
        prefix, _, name = key.rpartition("__")
        if name not in _THREAD_KEYS:
            continue
        owner = params.get(prefix, est) if prefix else est
        all_cores = value is None and type(owner).__module__.startswith("lightgbm")
        if isinstance(value, bool):
            continue
        if all_cores or (isinstance(value, (int, np.integer)) and (value <= 0 or value > threads)):
            updates[key] = int(threads)
    if updates:
        est.set_params(**updates)
    return est


# --------------------------------------------------------------------------- tally
@dataclass
class Tally:
    """Seconds spent inside learners' ``fit`` and ``predict`` calls (summed over tasks)."""

    fit_s: float = 0.0
    predict_s: float = 0.0
    tasks: int = 0

    def add(self, fit_s: float, predict_s: float) -> None:
        self.fit_s += fit_s
        self.predict_s += predict_s
        self.tasks += 1


def _guarded(fn: TaskFunction, shared: np.ndarray, task: Any, threads: int | None) -> Any:
    """Run one task in a worker; an exception is returned, so the caller re-raises in order."""
    try:
        return fn(shared, task, threads), None
    except Exception as exc:  # noqa: BLE001 - re-raised by Session.map in submission order
        return None, exc


def _dask_task(fn: TaskFunction, shared: np.ndarray, task: Any, slots: dict[str, int]) -> Any:
    """A task on a Dask worker: learner threads = the worker's cores / worker threads on its host."""
    from distributed import get_worker
    from distributed.comm import get_address_host

    host = get_address_host(get_worker().address)
    threads = max(1, _cores() // max(1, slots.get(host, _cores())))
    return _guarded(fn, shared, task, threads)


# --------------------------------------------------------------------------- sessions
@dataclass
class Session:
    """A backend with the feature matrix in place: :meth:`map` runs task lists on it."""

    backend: Backend
    shared: np.ndarray
    run: Callable[[TaskFunction, Iterable[Any]], Iterable[Any]]

    def map(self, fn: TaskFunction, tasks: Iterable[Any]) -> Iterator[Any]:
        """Run ``fn(shared, task, threads)`` for every task; yield the results in submission order.

        The first task (in submission order) that raised has its exception re-raised here.
        The sequential backend runs each task only when its result is asked for, so only one
        task's arrays and result exist at a time; consume the iterator to the end.
        """
        for value, exc in self.run(fn, tasks):
            if exc is not None:
                raise exc
            result, fit_s, predict_s = value
            self.backend.tally.add(fit_s, predict_s)
            yield result


@dataclass
class Backend:
    """A resolved ``backend=`` / ``n_jobs=`` choice (see :func:`resolve_backend`).

    Attributes
    ----------
    kind : {"sequential", "joblib", "dask"}
    n_jobs : int
        Worker processes (joblib); 1 for the sequential backend, 0 for Dask (the cluster
        decides).
    client : distributed.Client or None
        The client passed in, or the session's default client (Dask); used as is and left
        open.
    address : str or None
        Scheduler address to connect to for each session (Dask); the connection waits up to
        dask's ``distributed.comm.timeouts.connect`` and is closed after the session.
    tally : Tally
        Seconds inside learner fits and predictions so far.
    """

    kind: str
    n_jobs: int = 1
    client: Any = None
    address: str | None = None
    tally: Tally = field(default_factory=Tally)

    @property
    def learner_threads(self) -> int | None:
        """Thread cap for learners in joblib workers (None: leave the learners alone)."""
        if self.kind == "joblib" and self.n_jobs > 1:
            return max(1, _cores() // self.n_jobs)
        return None

    @contextmanager
    def session(self, shared: np.ndarray, *, dtype: np.dtype[Any] | type) -> Iterator[Session]:
        """Put ``shared`` where the workers can read it (cast to ``dtype``), and run tasks on it."""
        if self.kind == "sequential" or (self.kind == "joblib" and self.n_jobs == 1):
            # Lazily, one task after another: exceptions propagate at once, and only one
            # task's index arrays exist at a time.
            yield Session(self, shared, lambda fn, tasks: ((fn(shared, t, None), None) for t in tasks))
        elif self.kind == "joblib":
            with _memory_mapped(shared, dtype) as mapped:
                yield Session(self, mapped, lambda fn, tasks: self._run_joblib(fn, mapped, tasks))
        else:
            with self._dask_client() as client:
                data = shared if shared.dtype == np.dtype(dtype) else _cast(shared, dtype)
                handle = client.scatter(data, broadcast=True, hash=False)
                del data
                try:
                    yield Session(
                        self, shared, lambda fn, tasks: _run_dask(client, fn, handle, tasks)
                    )
                finally:
                    client.cancel([handle])

    def _run_joblib(self, fn: TaskFunction, mapped: np.ndarray, tasks: Iterable[Any]) -> list[Any]:
        from joblib import Parallel, delayed

        threads = self.learner_threads
        parallel = Parallel(n_jobs=self.n_jobs, backend="loky", pre_dispatch="2*n_jobs")
        return list(parallel(delayed(_guarded)(fn, mapped, task, threads) for task in tasks))

    @contextmanager
    def _dask_client(self) -> Iterator[Any]:
        if self.client is not None:
            yield self.client
            return
        from distributed import Client

        try:
            client = Client(self.address, set_as_default=False)
        except (OSError, TimeoutError) as exc:
            raise InputError(
                f"backend={self.address!r}: could not connect to a Dask scheduler there "
                f"({type(exc).__name__}: {exc}); start the scheduler or fix the address."
            ) from exc
        try:
            yield client
        finally:
            client.close()


def _cast(matrix: np.ndarray, dtype: np.dtype[Any] | type) -> np.ndarray:
    return take_rows(matrix, np.arange(matrix.shape[0]), None, dtype)


@contextmanager
def _memory_mapped(matrix: np.ndarray, dtype: np.dtype[Any] | type) -> Iterator[np.ndarray]:
    """``matrix`` (cast to ``dtype``) in a read-only memory-mapped file, removed afterwards.

    joblib hands a memory-mapped array to its workers by file name, so each worker maps the
    one file instead of receiving a copy per task.
    """
    folder = tempfile.mkdtemp(prefix="orthoccp-", dir=os.environ.get("JOBLIB_TEMP_FOLDER"))
    try:
        path = os.path.join(folder, "features.npy")
        out = np.lib.format.open_memmap(path, mode="w+", dtype=np.dtype(dtype), shape=matrix.shape)
        step = max(1, _BLOCK_BYTES // max(1, matrix.shape[1] * matrix.dtype.itemsize))
        for start in range(0, matrix.shape[0], step):
            out[start : start + step] = matrix[start : start + step]
        out.flush()
        del out
        yield np.load(path, mmap_mode="r")
    finally:
        shutil.rmtree(folder, ignore_errors=True)


def _host_slots(client: Any) -> dict[str, int]:
    """Worker threads per host of the cluster."""
    try:
        info = client.scheduler_info(n_workers=-1)
    except TypeError:  # older distributed: all workers are listed
        info = client.scheduler_info()
    slots: dict[str, int] = {}
    for worker in info.get("workers", {}).values():
        host = str(worker.get("host", ""))
        slots[host] = slots.get(host, 0) + int(worker.get("nthreads", 1))
    return slots


def _run_dask(client: Any, fn: TaskFunction, handle: Any, tasks: Iterable[Any]) -> list[Any]:
    slots = _host_slots(client)
    futures = []
    try:
        for task in tasks:
            payload = client.scatter(task, hash=False)
            futures.append(client.submit(_dask_task, fn, handle, payload, slots, pure=False))
        return [f.result() for f in futures]
    finally:
        client.cancel(futures)


# --------------------------------------------------------------------------- options
def resolve_backend(backend: Any = None, n_jobs: Any = None) -> Backend:
    """Check the ``backend=`` and ``n_jobs=`` options and turn them into a :class:`Backend`.

    Parameters
    ----------
    backend : {"sequential", "joblib", "dask"}, distributed.Client, str or None
        ``None`` picks ``"joblib"`` when ``n_jobs`` asks for more than one worker and
        ``"sequential"`` otherwise. A string with a scheme (``"tcp://10.0.0.5:8786"``) or of
        the form ``"host:port"`` is the address of a running Dask scheduler.
    n_jobs : int, optional
        Worker processes for ``"joblib"`` (-1: one per core; default: one per core). Must be
        omitted or 1 for ``"sequential"`` and omitted for Dask, whose workers set the
        parallelism.

    Returns
    -------
    Backend

    Raises
    ------
    orthoccp.InputError
        For an unknown backend, a bad ``n_jobs``, or Dask options without ``distributed``.
    """
    if n_jobs is not None:
        check_option("jobs", n_jobs, label="n_jobs")
    if backend is None:
        backend = "joblib" if n_jobs is not None and (n_jobs == -1 or n_jobs > 1) else "sequential"
    if isinstance(backend, str):
        if backend == "sequential":
            if n_jobs not in (None, 1):
                raise InputError(
                    f"n_jobs={n_jobs!r} does not apply to backend='sequential' (one task at a "
                    f"time); use backend='joblib' for {n_jobs} worker processes."
                )
            return Backend("sequential", 1)
        if backend == "joblib":
            workers = _cores() if n_jobs in (None, -1) else int(n_jobs)
            return Backend("joblib", workers)
        address = _scheduler_address(backend)
        if backend != "dask" and address is None:
            raise InputError(
                f"backend must be one of {', '.join(map(repr, BACKENDS))}, a dask.distributed "
                f"Client or a scheduler address such as 'tcp://host:8786'; got {backend!r}."
            )
        _require_distributed(backend)
        _no_jobs_for_dask(n_jobs)
        if address is not None:
            return Backend("dask", 0, address=address)
        from distributed import default_client

        try:
            return Backend("dask", 0, client=default_client())
        except ValueError as exc:
            raise InputError(
                "backend='dask' found no Dask client in this session; create one first "
                "(distributed.Client(...)), or pass the Client or the scheduler address as "
                "backend=."
            ) from exc
    if _is_client(backend):
        _no_jobs_for_dask(n_jobs)
        return Backend("dask", 0, client=backend)
    raise InputError(
        f"backend must be one of {', '.join(map(repr, BACKENDS))}, a dask.distributed Client "
        f"or a scheduler address; got {type(backend).__name__} {backend!r}."
    )


def _scheduler_address(text: str) -> str | None:
    if text.startswith(_ADDRESS_PREFIXES):
        return text
    host, sep, port = text.rpartition(":")
    if sep and host and port.isdigit():
        return f"tcp://{text}"
    return None


def _require_distributed(backend: str) -> None:
    try:
        import distributed  # noqa: F401
    except ImportError as exc:
        raise InputError(
            f"backend={backend!r} needs dask.distributed, which is not installed; install it "
            f"with 'pip install orthoccp[dask]' (or 'pip install \"dask[distributed]\"')."
        ) from exc


def _is_client(obj: Any) -> bool:
    try:
        from distributed import Client
    except ImportError:
        return False
    return isinstance(obj, Client)


def _no_jobs_for_dask(n_jobs: Any) -> None:
    if n_jobs is not None:
        raise InputError(
            f"n_jobs={n_jobs!r} does not apply to a Dask backend: the cluster's workers set the "
            f"parallelism; leave n_jobs unset."
        )

