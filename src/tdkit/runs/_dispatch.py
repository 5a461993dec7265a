"""Independent runs over an executor, with every outcome coming back as a record.

:func:`dispatch` is the one way :mod:`tdkit.sweep` and
:func:`tdkit.verify.compare_performance` send runs to an executor. What it
guarantees:

* **Failures are records, not exceptions in transit.** A run that raises is
  caught where it ran and comes back as a :class:`RunFailure` (the error text,
  the formatted traceback, and the pickled exception only when it unpickles
  again), so an exception class that cannot be rebuilt in this process is
  still reported as itself, never as a dead worker.
* **A dead worker is named correctly.** At most ``window`` runs are in
  flight, so when a process pool breaks the suspects are exactly the runs
  that were in flight; each is re-run alone in a fresh process, and the one
  whose process dies is named with its exit code. A Dask ``KilledWorker``
  already names its run. If no suspect dies when re-run alone, their results
  are kept and a warning says that a worker died for another reason.
* **Nothing finished is lost.** With ``stop_on_failure`` no new run starts
  after a failure, but the runs in flight finish and are returned.
* **Warnings travel.** A warning raised in another process (such as the
  driver's endless-episode warning) is still shown there at once, and is
  also returned so the caller can re-issue it here.
"""

from __future__ import annotations

import os
import signal
import socket
import threading
import traceback
import warnings
from collections.abc import Callable, Sequence
from concurrent.futures import (
    FIRST_COMPLETED,
    BrokenExecutor,
    CancelledError,
    Executor,
    Future,
    ProcessPoolExecutor,
    wait,
)
from dataclasses import dataclass, field
from multiprocessing.reduction import ForkingPickler  # what process pools send runs with
from typing import Any, NamedTuple

from .._text import describe_exception

__all__ = ["RunFailure", "RelayedWarning", "RunOutcome", "dispatch", "reissue_warnings"]


class _RemoteTraceback(Exception):
    """The traceback text of an exception raised in another process (chained as the cause)."""

    def __str__(self) -> str:
        return str(self.args[0]) if self.args else ""


@dataclass(frozen=True)
class RunFailure:
    """Why a run did not finish: it raised, or its worker process died.

    Attributes
    ----------
    error : str
        ``"TypeName: message"``, or a sentence about the dead worker.
    details : str
        The formatted traceback (empty for a dead worker).
    crashed : bool
        The worker process died (killed, segfault, ``os._exit``) while running it.
    """

    error: str
    details: str = ""
    crashed: bool = False
    payload: bytes | None = field(default=None, repr=False)
    local: BaseException | None = field(default=None, repr=False, compare=False)

    @classmethod
    def from_exception(cls, exc: BaseException, *, in_process: bool) -> RunFailure:
        """Record ``exc``; keep it pickled only if it unpickles again (for chaining)."""
        details = "".join(traceback.format_exception(type(exc), exc, exc.__traceback__))
        payload = None
        if not in_process:
            try:
                payload = bytes(ForkingPickler.dumps(exc))
                ForkingPickler.loads(payload)
            except Exception:  # any pickling failure means "text only"
                payload = None
        return cls(
            describe_exception(exc), details, payload=payload,
            local=exc if in_process else None,
        )

    def exception(self) -> BaseException | None:
        """The run's own exception when it can be rebuilt here, else its traceback as text."""
        if self.local is not None:
            return self.local
        if self.crashed:
            return None
        if self.payload is not None:
            try:
                exc = ForkingPickler.loads(self.payload)
            except Exception:  # rebuilt in the worker, so rare; fall back to text
                exc = None
            if isinstance(exc, BaseException):
                exc.__cause__ = _RemoteTraceback(self.details)
                return exc
        return _RemoteTraceback(f"{self.error}\n\nin the worker:\n{self.details}")

    def __reduce__(self) -> tuple[Any, ...]:
        return type(self), (self.error, self.details, self.crashed, self.payload)


class RelayedWarning(NamedTuple):
    """A warning raised while a run was going, in a form that pickles."""

    category: type[Warning]
    message: str
    filename: str
    lineno: int


class RunOutcome(NamedTuple):
    """What came back from one run: ``value`` or ``failure`` (one is None), and its warnings."""

    value: Any
    failure: RunFailure | None
    warnings: tuple[RelayedWarning, ...]


# ---------------------------------------------------------------- the worker side
_local = threading.local()


def _here() -> tuple[str, int]:
    return socket.gethostname(), os.getpid()


def _tee(original: Callable[..., Any]) -> Callable[..., Any]:
    def show(message: Any, category: type[Warning], filename: str, lineno: int,
             file: Any = None, line: Any = None) -> None:
        sink = getattr(_local, "sink", None)
        if sink is not None:
            if not _pickles(category):
                category = UserWarning
            sink.append(RelayedWarning(category, str(message), str(filename), int(lineno)))
        original(message, category, filename, lineno, file, line)

    show._tdkit_tee = True  # type: ignore[attr-defined]
    return show


def _pickles(value: Any) -> bool:
    try:
        ForkingPickler.loads(ForkingPickler.dumps(value))
    except Exception:
        return False
    return True


def _guarded(fn: Callable[..., Any], args: tuple[Any, ...], origin: tuple[str, int]) -> RunOutcome:
    """Run ``fn(*args)`` and return an :class:`RunOutcome`; never raises an ``Exception``.

    In a process other than ``origin`` the warnings of the run are collected
    (and still shown); in the calling process they are left alone, so they
    appear at once and nothing global is touched by a thread pool.
    """
    in_process = _here() == origin
    sink: list[RelayedWarning] | None = None
    if not in_process:
        if not getattr(warnings.showwarning, "_tdkit_tee", False):
            warnings.showwarning = _tee(warnings.showwarning)
        sink = []
        _local.sink = sink
    try:
        value = fn(*args)
    except Exception as exc:  # every failure becomes a record
        return RunOutcome(None, RunFailure.from_exception(exc, in_process=in_process),
                       tuple(sink or ()))
    finally:
        if sink is not None:
            _local.sink = None
    return RunOutcome(value, None, tuple(sink or ()))


def _child(conn: Any, fn: Callable[..., Any], args: tuple[Any, ...],
           origin: tuple[str, int]) -> None:  # pragma: no cover - runs in a child process
    conn.send(_guarded(fn, args, origin))
    conn.close()


def _run_alone(fn: Callable[..., Any], args: tuple[Any, ...]) -> RunOutcome:
    """Run one call in a fresh process of its own; a death of that process is the run's."""
    import multiprocessing

    context = multiprocessing.get_context()
    receive, send = context.Pipe(duplex=False)
    process = context.Process(target=_child, args=(send, fn, args, _here()), daemon=True)
    process.start()
    send.close()
    try:
        outcome = receive.recv()
    except EOFError:
        outcome = None
    finally:
        receive.close()
        process.join()
    if outcome is not None:
        return outcome
    return RunOutcome(None, RunFailure(_death(process.exitcode), crashed=True), ())


def _death(exitcode: int | None) -> str:
    if exitcode is not None and exitcode < 0:
        try:
            name = signal.Signals(-exitcode).name
        except ValueError:
            name = f"signal {-exitcode}"
        how = f"was killed by {name}"
    else:
        how = f"exited with code {exitcode}"
    return f"its worker process {how} while running it (re-run alone in a fresh process)"


# ---------------------------------------------------------------- the caller side
def _is_killed_worker(exc: BaseException) -> bool:
    # Dask distributed names the task that killed its workers (KilledWorker).
    return type(exc).__name__ == "KilledWorker"


def _window(executor: Executor, workers: int, n: int) -> int:
    """How many tasks to keep in flight: two per worker, so none waits for the next."""
    width = _width(executor, workers)
    return n if width is None else min(2 * width, n)


def _width(executor: Executor, workers: int) -> int | None:
    """The executor's number of workers, when it can be known (None for Dask and others)."""
    width = getattr(executor, "_max_workers", None)
    if isinstance(width, int) and width >= 1:
        return width
    client = getattr(executor, "_client", None)  # distributed.client.ClientExecutor
    if client is not None:
        try:
            threads = sum(client.nthreads().values())
        except Exception:  # a client that cannot tell
            threads = 0
        return threads or None
    return None if workers == 0 else workers


def _chunk_size(executor: Executor, workers: int, n: int) -> int:
    """Calls per task: 1, except on a Dask client, which pays a scheduler cost per task and
    gets about 4 tasks per worker. Executors whose width is unknown get 1 (a wide pool of
    unknown size must not be left with a few large tasks)."""
    if workers != 0 or getattr(executor, "_client", None) is None:
        return 1
    width = _width(executor, workers)
    return 1 if width is None else max(1, n // (4 * width))


def _guarded_chunk(fn: Callable[..., Any], calls: Sequence[tuple[Any, ...]],
                   origin: tuple[str, int]) -> tuple[RunOutcome, ...]:
    """:func:`_guarded` for several calls in one task."""
    return tuple(_guarded(fn, args, origin) for args in calls)


def dispatch(
    fn: Callable[..., Any],
    calls: Sequence[tuple[Any, ...]],
    *,
    executor: Executor | None,
    workers: int,
    stop_on_failure: bool,
    on_done: Callable[[int, RunOutcome], None] | None = None,
) -> list[RunOutcome | None]:
    """Run ``fn(*args)`` for every ``args`` in ``calls``; one outcome per call, in order.

    Parameters
    ----------
    fn : callable
        Module level, so process pools can pickle it.
    calls : sequence of tuple
    executor : Executor or None
        Where the calls go. None: in this process when ``workers == 1``, else
        a ``ProcessPoolExecutor(workers)`` made (and shut down) here.
    workers : int
        Width of the default pool (ignored with an executor).
    stop_on_failure : bool
        Start no new call after one fails; calls in flight still finish.
    on_done : callable, optional
        ``on_done(index, outcome)`` as each call finishes (a progress bar).

    Returns
    -------
    list
        An :class:`RunOutcome` per call, or None for a call never started.
    """
    outcomes: list[RunOutcome | None] = [None] * len(calls)

    def done(index: int, outcome: RunOutcome) -> None:
        outcomes[index] = outcome
        if on_done is not None:
            on_done(index, outcome)

    origin = _here()
    if executor is None and workers == 1:
        for index, args in enumerate(calls):
            outcome = _guarded(fn, args, origin)
            done(index, outcome)
            if outcome.failure is not None and stop_on_failure:
                break
        return outcomes
    own = executor is None
    pool: Executor = ProcessPoolExecutor(workers) if own else executor  # type: ignore[assignment]
    pending = list(range(len(calls)))
    pending.reverse()  # pop() from the end gives the calls in order
    try:
        while pending:
            broken, suspects = _drain(pool, fn, calls, pending, origin, workers if own else 0,
                                      stop_on_failure, done)
            if not broken:
                break
            if not suspects and own:
                raise RuntimeError(
                    "dispatch: a new process pool broke before running anything; the machine "
                    "cannot start worker processes (run with max_workers=1)."
                )
            for index in sorted(suspects):  # re-run each suspect alone
                done(index, _run_alone(fn, calls[index]))
            if suspects and not any(outcomes[i].failure for i in suspects):  # type: ignore[union-attr]
                warnings.warn(
                    f"a worker process died while the runs {sorted(suspects)} (by position) "
                    "were in flight, but each finished when re-run alone, so their results "
                    "are kept. Something outside the runs stopped the worker (a memory "
                    "limit, a signal from outside).",
                    RuntimeWarning, stacklevel=3,
                )
            if stop_on_failure and any(o is not None and o.failure for o in outcomes):
                break
            if pending:  # the pool is broken: go on in a fresh local one of the same width
                width = _window(pool, workers, len(calls))
                if own:
                    pool.shutdown(wait=False, cancel_futures=True)
                pool = ProcessPoolExecutor(width)
                own = True
    finally:
        if own:
            pool.shutdown(wait=True, cancel_futures=True)
    return outcomes


def _drain(pool: Executor, fn: Callable[..., Any], calls: Sequence[tuple[Any, ...]],
           pending: list[int], origin: tuple[str, int], workers: int, stop_on_failure: bool,
           done: Callable[[int, RunOutcome], None]) -> tuple[bool, set[int]]:
    """Keep a window of calls in flight until ``pending`` is empty, a call fails, or the pool
    breaks.

    Returns whether the pool broke and the calls that were in flight when it did (the
    suspects; they are not done).
    """
    chunk = _chunk_size(pool, workers, len(calls))
    window = _window(pool, workers, len(calls))
    in_flight: dict[Future, tuple[int, ...]] = {}
    suspects: set[int] = set()
    broken = stopped = False
    while in_flight or (pending and not stopped and not broken):
        while pending and not stopped and not broken and len(in_flight) < window:
            indices = tuple(pending.pop() for _ in range(min(chunk, len(pending))))
            try:
                if chunk == 1:
                    future = pool.submit(_guarded, fn, calls[indices[0]], origin)
                else:
                    future = pool.submit(_guarded_chunk, fn, [calls[i] for i in indices], origin)
                in_flight[future] = indices
            except BrokenExecutor:
                pending.extend(reversed(indices))
                broken = True
            except Exception as exc:  # e.g. the executor cannot serialise it
                for index in indices:
                    done(index, RunOutcome(None, RunFailure.from_exception(exc, in_process=True),
                                           ()))
                stopped = stop_on_failure
        if not in_flight:
            break
        finished, _ = wait(in_flight, return_when=FIRST_COMPLETED)
        for future in finished:
            indices = in_flight.pop(future)
            try:
                result = future.result()
                outcomes = (result,) if chunk == 1 else result
            except BrokenExecutor:
                broken = True
                suspects.update(indices)
                continue
            except CancelledError:
                pending.extend(indices)
                pending.sort(reverse=True)
                continue
            except Exception as exc:  # the result could not come back
                failure = (
                    RunFailure(f"it killed its worker processes ({exc})", crashed=True)
                    if _is_killed_worker(exc) else RunFailure.from_exception(exc, in_process=True)
                )
                outcomes = (RunOutcome(None, failure, ()),) * len(indices)
            for index, outcome in zip(indices, outcomes, strict=True):
                done(index, outcome)
                if outcome.failure is not None and stop_on_failure:
                    stopped = True
    return broken, suspects


def reissue_warnings(relayed: Sequence[RelayedWarning], where: str) -> None:
    """Issue here the warnings a run raised in another process, prefixed with ``where``."""
    for item in relayed:
        warnings.warn_explicit(f"{where}: {item.message}", item.category, item.filename,
                               item.lineno)
