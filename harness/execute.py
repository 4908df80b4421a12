"""Executors of `rdcheck validate`: run tasks inline, in a local process pool or on a Dask cluster.

The driver calls :func:`execute`; it skips tasks already in the store, runs each distinct key once and
writes each record to the store the moment it arrives, so a killed driver loses only the runs in flight.

Failures are records, never holes. A worker that dies (segfault, SIGKILL, out of memory), a run that
raises anything but :class:`~harness.errors.InputError`, or a run past the hard timeout is retried
``retries`` times, then stored as outcome ``unsettled``, status ``failed``, with ``error`` saying why.
When a worker dies while several runs are in flight, nobody knows whose run killed it: none of them is
charged, and each is rerun alone until it completes or dies alone (so one bad run never takes its
neighbours down with it). A hard timeout kills the pool's workers and reruns the innocent runs in flight.
Bad input (InputError) stops the sweep: the executor shuts down and raises it with its one-line message.

Pool processes start from a fork server with the harness preloaded (Linux; measured 0.03 s to a first
result, spawn 0.2-0.9 s); forking the driver itself is avoided because it runs threads (the pool's manager
thread, tqdm's monitor). The pool is kept across calls (the driver calls :func:`execute` once per
bisection step), so workers keep their compiled models; :func:`shutdown_pools` stops it. Each worker runs
one task and one more waits queued, so the driver's store writes never leave a worker idle.

On Dask, worker deaths are first retried by the scheduler itself (``distributed.scheduler.allowed-failures``)
and then count as one crash here; the hard timeout is not enforced there (the soft ``wall_limit`` is).
"""

from __future__ import annotations

import atexit
import hashlib
import multiprocessing
import os
import signal
import sys
import time
import warnings
from collections import deque
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace

from .errors import InputError
from .runs import RunRecord, RunTask

__all__ = ["execute", "failed_record", "hard_timeout", "parse_shard", "shard", "shard_index", "shutdown_pools",
           "task_key"]

#: Modules the fork server imports once, so that each new worker starts warm.
PRELOAD = ["numpy", "scipy.sparse", "sympy", "harness.runs", "harness.case", "harness.model", "harness.simulate",
           "solvers.stepping"]

RunFunction = Callable[[RunTask, "float | None"], RunRecord]


def task_key(task: RunTask) -> str:
    """The content key of ``task`` (:func:`harness.runs.run_key` on its case and model, cached per process)."""
    from .runs import _load, run_key

    case, model = _load(task.case_path, task.overrides)
    return run_key(case, model, task)


# sharding ----------------------------------------------------------------------------------------------
def parse_shard(text: str) -> tuple[int, int]:
    """Read the `--shard` value ``K/N`` (1 <= K <= N) into ``(K, N)``."""
    k, sep, n = str(text).partition("/")
    try:
        kk, nn = int(k), int(n)
    except ValueError:
        kk = nn = 0
    if not sep or nn < 1 or not 1 <= kk <= nn:
        msg = f"`--shard`: expected K/N with integers 1 <= K <= N (e.g. 2/4), got {text!r}"
        raise InputError(msg)
    return kk, nn


def shard_index(key: str, n: int) -> int:
    """The 1-based shard (of ``n``) that ``key`` belongs to: a hash of the key, stable everywhere."""
    return int.from_bytes(hashlib.sha256(key.encode()).digest()[:8], "big") % n + 1


def shard(items: Sequence, k: int, n: int, key_of: Callable[[object], str]) -> list:
    """Slice ``k`` of ``n`` of ``items`` (1-based), chosen by the hash of ``key_of(item)``.

    The slices of ``1/n .. n/n`` are disjoint and cover ``items``; membership depends only on the key, so
    it is the same on every rerun and in any order of ``items``.
    """
    if not (isinstance(n, int) and isinstance(k, int) and 1 <= k <= n):
        msg = f"`k`, `n` must be integers with 1 <= k <= n, got {k!r}, {n!r}"
        raise ValueError(msg)
    return [item for item in items if shard_index(key_of(item), n) == k]


# worker side --------------------------------------------------------------------------------------------
def _describe(exc: BaseException) -> str:
    """``Type: message (at file:line)`` of the innermost frame, for a one-line `error`."""
    tb = exc.__traceback__
    while tb is not None and tb.tb_next is not None:
        tb = tb.tb_next
    where = f" (at {os.path.basename(tb.tb_frame.f_code.co_filename)}:{tb.tb_lineno})" if tb is not None else ""
    text = " ".join(str(exc).split())
    return f"{type(exc).__name__}: {text}{where}"


def _work(run: RunFunction, task: RunTask, wall_limit: float | None) -> tuple:
    """Run one task; results and failures come back as plain tuples (every exception pickles as text)."""
    try:
        return ("ok", run(task, wall_limit))
    except InputError as exc:
        return ("input", str(exc))
    except Exception as exc:  # noqa: BLE001 - any failure of a run is reported, never lost
        return ("error", _describe(exc))


def _worker_init(driver: int) -> None:
    """Workers leave Ctrl-C to the driver, and exit when the driver is gone (only it could store a result)."""
    import threading

    signal.signal(signal.SIGINT, signal.SIG_IGN)

    def watch() -> None:
        while True:
            time.sleep(1.0)
            try:
                os.kill(driver, 0)
            except ProcessLookupError:
                os._exit(1)
            except PermissionError:  # the pid was reused by someone else's process: the driver is gone
                os._exit(1)

    threading.Thread(target=watch, name="rdcheck-driver-watch", daemon=True).start()


def _default_run() -> RunFunction:
    from . import runs

    return runs.run_task


# driver side ---------------------------------------------------------------------------------------------
@dataclass
class _Job:
    """One distinct key to run, with its attempts so far."""

    key: str
    task: RunTask
    attempts: int = 0
    wall: float = 0.0
    suspect: bool = False


def hard_timeout(wall_limit: float | None) -> float | None:
    """Default hard timeout for a run with soft limit ``wall_limit``: twice it, at least a minute more."""
    return None if wall_limit is None else max(2.0 * wall_limit, wall_limit + 60.0)


#: The reason of a record that holds no result; a rerun tries such runs again (the crash may have been the
#: machine's, not the run's).
FAILED_REASON = "no result: the run failed"


def failed_record(key: str, task: RunTask, error: str, wall: float) -> RunRecord:
    """The record of a run that never produced a result (crash, exception, timeout)."""
    return RunRecord(key=key, task=task, outcome="unsettled", reason=FAILED_REASON, t_final=0.0,
                     mass_drift=None, status="failed", steps=0, wall=float(wall), error=error)


class _Book:
    """Bookkeeping shared by the executors: store on arrival, charge failures, progress bar."""

    def __init__(self, store, retries: int, bar) -> None:
        self.store, self.retries, self.bar = store, retries, bar
        self.done: dict[str, RunRecord] = {}
        self.failed = 0
        self._warned = False

    def finish(self, job: _Job, record: RunRecord) -> None:
        if record.key != job.key:
            if not self._warned:
                warnings.warn(f"run key {record.key} differs from the driver's key {job.key}; stored under the "
                              "driver's", stacklevel=3)
                self._warned = True
            record = replace(record, key=job.key)
        self.store.put(record)
        self.done[job.key] = record
        self.failed += record.status == "failed"
        self.bar.update(1)
        if self.failed:
            self.bar.set_postfix(failed=self.failed, refresh=False)

    def charge(self, job: _Job, error: str) -> bool:
        """Count a failed attempt; store the failure once attempts are used up. True if it should rerun."""
        job.attempts += 1
        if job.attempts <= self.retries:
            return True
        tries = f"{job.attempts} attempt{'s' if job.attempts > 1 else ''}"
        self.finish(job, failed_record(job.key, job.task, f"{error}; {tries}", job.wall))
        return False


def execute(tasks: Sequence[RunTask], store, *, key_of: Callable[[RunTask], str], workers: int | None = None,
            scheduler: str | None = None, wall_limit: float | None = None, progress: bool = True,
            retries: int = 1, timeout: float | None = None, run: RunFunction | None = None) -> list[RunRecord]:
    """Run ``tasks`` that the store lacks, storing each record as it arrives; return one record per task.

    Parameters
    ----------
    tasks
        The runs asked for; equal keys are run once and share their record.
    store
        A :class:`~harness.store.Store`; tasks whose key it has are not run (their stored record is returned).
    key_of
        The driver's content key of a task (the store key).
    workers
        Local worker processes (default ``os.cpu_count()``); ``0`` runs inline in this process (debugging,
        tests: no crash isolation, no hard timeout).
    scheduler
        Address of a running Dask scheduler, instead of local processes.
    wall_limit
        Soft limit per run in seconds, passed to the run (which stops and classifies what it reached).
    progress
        Show a tqdm bar on stderr (runs done / total, time left).
    retries
        Reruns of a run that crashed, raised or timed out before it is stored as failed.
    timeout
        Hard limit per run in seconds (local pool only), default :func:`hard_timeout` of ``wall_limit``.
    run
        The run function ``run(task, wall_limit) -> RunRecord``, default :func:`harness.runs.run_task`; it
        must be picklable (a module-level function) for the pool and Dask.
    """
    from tqdm import tqdm

    if workers is not None and (not isinstance(workers, int) or workers < 0):
        msg = f"`workers` must be an integer >= 0, got {workers!r}"
        raise ValueError(msg)
    if scheduler is not None and workers is not None:
        msg = "`workers` and `scheduler` exclude each other"
        raise ValueError(msg)
    if not isinstance(retries, int) or retries < 0:
        msg = f"`retries` must be an integer >= 0, got {retries!r}"
        raise ValueError(msg)
    if timeout is not None and (workers == 0 or scheduler is not None):
        warnings.warn("`timeout` is enforced by the local pool only (not inline, not on Dask)", stacklevel=2)
    run = _default_run() if run is None else run
    timeout = hard_timeout(wall_limit) if timeout is None else float(timeout)
    # step: keys, dedup, what the store already has
    keys = [key_of(t) for t in tasks]
    present = sorted({k for k in keys if store.has(k)})
    kept = {r.key: r for r in store.get_many(present) if r.reason != FAILED_REASON}  # failures run again
    todo: dict[str, _Job] = {}
    for k, t in zip(keys, tasks):
        if k not in kept and k not in todo:
            todo[k] = _Job(k, t)
    stored = sorted(kept)
    total = len(stored) + len(todo)
    bar = tqdm(total=total, initial=len(stored), desc="runs", unit="run", file=sys.stderr,
               disable=not progress or not todo, dynamic_ncols=True, smoothing=0.1)
    book = _Book(store, retries, bar)
    try:
        if todo:
            if scheduler is not None:
                _run_dask(list(todo.values()), book, scheduler, run, wall_limit)
            elif workers == 0:
                _run_inline(list(todo.values()), book, run, wall_limit)
            else:
                _run_pool(list(todo.values()), book, workers or os.cpu_count() or 1, run, wall_limit, timeout)
    finally:
        bar.close()
    records = {**kept, **book.done}
    return [records[k] for k in keys]


def _run_inline(jobs: list[_Job], book: _Book, run: RunFunction, wall_limit: float | None) -> None:
    queue = deque(jobs)
    while queue:
        job = queue.popleft()
        t0 = time.perf_counter()
        try:
            record = run(job.task, wall_limit)
        except InputError:
            raise
        except Exception as exc:  # noqa: BLE001
            job.wall += time.perf_counter() - t0
            if book.charge(job, f"run raised {_describe(exc)}"):
                queue.appendleft(job)
            continue
        book.finish(job, record)


def _pool_context():
    """A fork server with the harness preloaded where available, else spawn (never a bare fork)."""
    if "forkserver" in multiprocessing.get_all_start_methods():
        ctx = multiprocessing.get_context("forkserver")
        ctx.set_forkserver_preload(PRELOAD)
        return ctx
    return multiprocessing.get_context("spawn")


_POOLS: dict[int, object] = {}


def _pool(n: int):
    """A pool of ``n`` workers, kept across calls so that workers (and their compiled models) stay warm."""
    from concurrent.futures import ProcessPoolExecutor

    if n not in _POOLS:
        _POOLS[n] = ProcessPoolExecutor(max_workers=n, mp_context=_pool_context(), initializer=_worker_init,
                                        initargs=(os.getpid(),))
    return _POOLS[n]


def shutdown_pools() -> None:
    """Stop the kept worker pools (registered to run when the driver exits, before the interpreter tears
    down the modules that the pools' own exit hooks need)."""
    while _POOLS:
        _POOLS.popitem()[1].shutdown(wait=True, cancel_futures=True)


atexit.register(shutdown_pools)


def _kill_pool(n: int) -> None:
    """Kill the workers of pool ``n`` (the only way to stop a stuck run) and forget the pool."""
    pool = _POOLS.pop(n, None)
    if pool is None:
        return
    for p in list((getattr(pool, "_processes", None) or {}).values()):
        if p.is_alive():
            p.kill()
    pool.shutdown(wait=True, cancel_futures=True)


def _exit_codes(pool) -> str:
    """How the pool's dead workers ended, e.g. ``killed by SIGKILL`` (best effort)."""
    out = []
    if pool is None:
        return "a worker process died"
    for p in list((getattr(pool, "_processes", None) or {}).values()):
        code = p.exitcode
        if code is not None and code < 0:
            try:
                out.append(f"killed by {signal.Signals(-code).name}")
            except ValueError:
                out.append(f"killed by signal {-code}")
        elif code:
            out.append(f"exit status {code}")
    return ", ".join(sorted(set(out))) or "a worker process died"


def _run_pool(jobs: list[_Job], book: _Book, n: int, run: RunFunction, wall_limit: float | None,
              timeout: float | None) -> None:
    from concurrent.futures import FIRST_COMPLETED, wait
    from concurrent.futures.process import BrokenProcessPool

    queue = deque(jobs)
    inflight: dict = {}  # future -> [job, start or None], in submission order

    def settle(fut, job: _Job) -> None:
        kind, value = fut.result()
        if kind == "ok":
            book.finish(job, value)
        elif kind == "input":
            raise InputError(value)
        elif book.charge(job, f"run raised {value}"):
            queue.appendleft(job)

    try:
        while queue or inflight:
            # step: keep n runs going and one queued (workers never wait for the driver's store write);
            # a suspect runs alone
            dead = False  # the pool broke before we noticed (a worker died since the last wait)
            while queue and len(inflight) < n + 1 and not any(j.suspect for j, _ in inflight.values()):
                if queue[0].suspect and inflight:
                    break
                job = queue.popleft()
                try:
                    inflight[_pool(n).submit(_work, run, job.task, wall_limit)] = [job, None]
                except BrokenProcessPool:
                    queue.appendleft(job)
                    dead = True
                    break
            now = time.perf_counter()
            for slot in list(inflight.values())[:n]:  # the oldest n are running: start their clocks
                slot[1] = now if slot[1] is None else slot[1]
            if dead:
                done, _ = wait(list(inflight), timeout=10.0)
            else:
                starts = [t0 for _, t0 in inflight.values() if t0 is not None]
                wait_for = None if timeout is None else max(0.0, min(starts) + timeout - now)
                done, _ = wait(list(inflight), timeout=wait_for, return_when=FIRST_COMPLETED)
            now = time.perf_counter()
            broken = []
            for fut in done:
                job, t0 = inflight.pop(fut)
                job.wall += now - (t0 or now)
                try:
                    settle(fut, job)
                except BrokenProcessPool:
                    broken.append(job)
            if broken or dead:
                # step: a worker died; collect the other runs in flight (finished ones count), then restart
                why = _exit_codes(_POOLS.get(n))
                wait(list(inflight), timeout=10.0)
                for fut, (job, t0) in list(inflight.items()):
                    job.wall += now - (t0 or now)
                    try:
                        settle(fut, job)
                    except BrokenProcessPool:
                        broken.append(job)
                    except Exception:  # noqa: BLE001 - unfinished after the break: rerun it
                        broken.append(job)
                inflight.clear()
                _kill_pool(n)
                if len(broken) == 1:
                    if book.charge(broken[0], f"worker crashed: {why}"):
                        queue.appendleft(broken[0])
                else:
                    for job in reversed(broken):
                        job.suspect = True
                        queue.appendleft(job)
            elif not done and timeout is not None:
                # step: someone is past the hard limit: kill the workers, charge the late, rerun the rest
                slots = list(inflight.values())
                inflight.clear()
                _kill_pool(n)
                for job, t0 in reversed(slots):
                    if t0 is not None and now - t0 >= timeout:
                        job.wall += timeout
                        if book.charge(job, f"timed out after {timeout:g} s"):
                            queue.appendleft(job)
                    else:
                        job.wall += now - (t0 or now)
                        queue.appendleft(job)
    except BaseException:
        _kill_pool(n)
        raise


def _run_dask(jobs: list[_Job], book: _Book, address: str, run: RunFunction, wall_limit: float | None) -> None:
    """Submit every job to a Dask cluster; store results as they complete (no hard timeout here)."""
    from distributed import Client, as_completed

    try:
        client = Client(address, timeout="30s", set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        msg = f"`--scheduler`: cannot connect to a Dask scheduler at {address!r} ({' '.join(str(exc).split())})"
        raise InputError(msg) from None
    futures: dict = {}

    def submit(job: _Job):
        fut = client.submit(_work, run, job.task, wall_limit, pure=False,
                            key=f"rdcheck-run-{job.key}-{job.attempts}")
        futures[fut] = (job, time.perf_counter())
        return fut

    try:
        pending = as_completed([submit(job) for job in jobs], loop=client.loop)
        for fut in pending:
            job, t0 = futures.pop(fut)
            job.wall += time.perf_counter() - t0
            if fut.status == "finished":
                kind, value = fut.result()
                if kind == "ok":
                    book.finish(job, value)
                    continue
                if kind == "input":
                    raise InputError(value)
                error = f"run raised {value}"
            else:
                exc = fut.exception() if fut.status == "error" else None
                error = f"worker crashed: {_describe(exc) if exc is not None else fut.status}"
            if book.charge(job, error):
                pending.add(submit(job))
            fut.release()
    except BaseException:
        client.cancel(list(futures))
        raise
    finally:
        client.close()

