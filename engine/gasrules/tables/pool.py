"""An ordered worker pool over processes, for streams of chunks (batch, impact replay).

    from gasrules.tables.pool import OrderedPool, chunked

    def work(rulebook, rows):                    # a module-level function: (payload, chunk) -> result
        return [interpret_row(rulebook, r) for r in rows]

    with OrderedPool(work, payload=rb, workers=2) as pool:
        for results in pool.map(chunked(rows, 500)):   # results in input order, chunk by chunk
            ...

Guarantees:

* **order**: results come back in the order the chunks went in, whatever finishes first;
* **same answer for 1 and N workers**: ``workers=1`` calls ``fn`` in this process with the same
  payload; N workers call the same ``fn`` on an unpickled copy (a CompiledRulebook relinks
  itself when unpickled), so a pure ``fn`` gives identical results;
* **payload sent once**: the payload is pickled once per worker process when it starts, never
  per chunk;
* **bounded memory**: at most ``window`` chunks (default 2 x workers + 2) are in flight or
  waiting to be consumed; the input iterator is read only as fast as results are taken;
* **failures surface**: an exception in ``fn`` is raised from :meth:`OrderedPool.map` at that
  chunk's place in the order; a worker that dies raises :class:`PoolError`.

Workers start with the ``spawn`` method by default (safe when the parent has threads, as a
Dask client or a progress thread does); the caller's ``__main__`` must be import-safe.
"""

from __future__ import annotations

from collections import deque
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import Future, ProcessPoolExecutor
from concurrent.futures.process import BrokenProcessPool
from itertools import islice
from typing import Any, Generic, TypeVar

from gasrules.core.errors import EngineError

__all__ = ["OrderedPool", "PoolError", "chunked", "imap_ordered", "interpret_many"]

P = TypeVar("P")
C = TypeVar("C")
R = TypeVar("R")

_PAYLOAD: Any = None


class PoolError(EngineError, RuntimeError):
    """A worker process died (killed, out of memory) before returning its chunk."""


def _init_worker(payload: Any, parent: int | None = None) -> None:
    global _PAYLOAD
    _PAYLOAD = payload
    if parent is not None:
        watch_parent(parent)


def watch_parent(parent: int, interval: float = 0.25) -> None:
    """Exit this worker process when ``parent`` is gone (killed, even with SIGKILL, which runs
    no clean-up in the parent): a daemon thread compares the parent process id."""
    import os
    import threading

    def watch() -> None:
        import time

        while True:
            if os.getppid() != parent:
                os._exit(1)
            time.sleep(interval)

    threading.Thread(target=watch, name="gasrules-parent-watch", daemon=True).start()


def _call(fn: Callable[[Any, Any], Any], chunk: Any) -> Any:
    return fn(_PAYLOAD, chunk)


def chunked(items: Iterable[C], size: int) -> Iterator[list[C]]:
    """Consecutive lists of ``size`` items (the last may be shorter), read lazily."""
    if size < 1:
        raise ValueError(f"chunk size must be 1 or more, got {size}")
    it = iter(items)
    while True:
        chunk = list(islice(it, size))
        if not chunk:
            return
        yield chunk


class OrderedPool(Generic[P, C, R]):
    """Apply ``fn(payload, chunk)`` to a stream of chunks on ``workers`` processes, in order."""

    def __init__(
        self,
        fn: Callable[[P, C], R],
        payload: P = None,
        workers: int = 1,
        *,
        window: int | None = None,
        start_method: str = "spawn",
    ) -> None:
        if workers < 1:
            raise ValueError(f"workers must be 1 or more, got {workers}")
        self.fn, self.payload, self.workers = fn, payload, int(workers)
        self.window = window if window is not None else 2 * self.workers + 2
        if self.window < 1:
            raise ValueError(f"window must be 1 or more, got {self.window}")
        self.start_method = start_method
        self._executor: ProcessPoolExecutor | None = None

    def __enter__(self) -> OrderedPool[P, C, R]:
        self.start()
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def start(self) -> None:
        if self.workers > 1 and self._executor is None:
            import multiprocessing as mp
            import os

            self._executor = ProcessPoolExecutor(
                self.workers,
                mp_context=mp.get_context(self.start_method),
                initializer=_init_worker,
                initargs=(self.payload, os.getpid()),
            )

    def close(self) -> None:
        if self._executor is not None:
            self._executor.shutdown(wait=True, cancel_futures=True)
            self._executor = None

    def map(self, chunks: Iterable[C]) -> Iterator[R]:
        """Results of ``fn`` per chunk, in input order."""
        if self.workers == 1:
            for chunk in chunks:
                yield self.fn(self.payload, chunk)
            return
        self.start()
        assert self._executor is not None
        pending: deque[Future[R]] = deque()
        try:
            for chunk in chunks:
                pending.append(self._submit(chunk))
                if len(pending) >= self.window:
                    yield self._result(pending.popleft())
            while pending:
                yield self._result(pending.popleft())
        finally:
            for f in pending:
                f.cancel()

    def _submit(self, chunk: C) -> Future[R]:
        assert self._executor is not None
        try:
            return self._executor.submit(_call, self.fn, chunk)
        except BrokenProcessPool as exc:
            raise PoolError(_DIED) from exc

    @staticmethod
    def _result(future: Future[R]) -> R:
        try:
            return future.result()
        except BrokenProcessPool as exc:
            raise PoolError(_DIED) from exc


_DIED = (
    "a worker process died before returning its chunk (killed or out of memory); "
    "the run stops so that no row is lost silently"
)


def imap_ordered(
    fn: Callable[[P, C], R], chunks: Iterable[C], payload: P = None, workers: int = 1, **options: Any
) -> Iterator[R]:
    """One-shot form of :class:`OrderedPool`: start, map in order, shut down."""
    with OrderedPool(fn, payload, workers, **options) as pool:
        yield from pool.map(chunks)


def _interpret_chunk(job: tuple[Any, bool], cases: list[Any]) -> list[dict[str, Any]]:
    from gasrules.evaluation.evaluator import interpret

    rulebook, trace = job
    return [interpret(rulebook, case, trace) for case in cases]


def interpret_many(
    rulebook: Any, cases: Iterable[Any], workers: int = 1, trace: bool = True, chunksize: int = 256
) -> Iterator[dict[str, Any]]:
    """Results in input order, one per case (bad cases rejected inline), on the same bounded,
    ordered pool as ``batch``: the input is read only as fast as results are taken."""
    import gc

    # Results hold no reference cycles: a caller keeping many of them would only make the
    # cyclic collector rescan a growing heap. Collect less often while the loop runs.
    before = gc.get_threshold()
    gc.set_threshold(max(before[0], 50_000), before[1], before[2])
    try:
        size = 1 if workers <= 1 else chunksize
        for results in imap_ordered(_interpret_chunk, chunked(cases, size), (rulebook, trace), workers):
            yield from results
    finally:
        gc.set_threshold(*before)
