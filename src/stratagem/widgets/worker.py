"""Background computation for widgets: the newest request wins, stale work is abandoned.

One daemon thread per widget runs the jobs. Each request gets a generation number; a job whose
generation is no longer the newest is never delivered, and while it runs its ``cancelled()`` check
(passed to :func:`stratagem.analyze` through the progress callback) stops bootstrap work early.

Results are handed back through ``post``: inside a Jupyter kernel that is the kernel's main event
loop (``kernel.io_loop.add_callback``, which is thread-safe), so widget traits are only ever written
on the thread that also handles the front end's messages; outside a kernel (plain Python, tests) the
delivery runs on the worker thread under the runner's lock.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

__all__ = ["Runner", "Outcome", "Superseded", "kernel_post"]


class Superseded(Exception):
    """Raised inside a job when a newer request has replaced it (never reaches the user)."""


@dataclass(frozen=True)
class Outcome:
    """What one job produced: a value, or the exception it raised."""

    generation: int
    value: Any = None
    error: BaseException | None = None


def kernel_post() -> Callable[[Callable[[], None]], None] | None:
    """``add_callback`` of the running IPython kernel's main loop, or None outside a kernel."""
    try:
        from IPython import get_ipython
    except ImportError:  # pragma: no cover - IPython is a dependency of ipywidgets
        return None
    shell = get_ipython()
    loop = getattr(getattr(shell, "kernel", None), "io_loop", None)
    return getattr(loop, "add_callback", None)


class Runner:
    """Run ``job(argument, check)`` off the calling thread; deliver only the newest outcome.

    Parameters
    ----------
    deliver : callable(Outcome)
        Called once per finished, still-current job (on the main loop when ``post`` is given).
    post : callable or None
        Schedules a zero-argument callable on the thread that owns the widget; None delivers on the
        worker thread under the runner's lock.
    """

    def __init__(self, deliver: Callable[[Outcome], None], post=None):
        self._deliver = deliver
        self._post = post
        self._cond = threading.Condition()
        self._generation = 0
        self._pending: tuple[int, Callable, Any] | None = None
        self._finished: Outcome | None = None  # newest computed outcome, delivered or not
        self._delivered = 0
        self._closed = False
        self._thread: threading.Thread | None = None

    # -- requests ------------------------------------------------------------------------------
    @property
    def generation(self) -> int:
        return self._generation

    def submit(self, job: Callable[[Any, Callable[[], None]], Any], argument: Any) -> int:
        """Queue ``job(argument, check)``; it supersedes every earlier request. Returns its generation."""
        with self._cond:
            self._generation += 1
            self._pending = (self._generation, job, argument)
            if self._thread is None or not self._thread.is_alive():
                self._thread = threading.Thread(target=self._loop, name="stratagem-worker", daemon=True)
                self._thread.start()
            self._cond.notify_all()
            return self._generation

    def run_here(self, job: Callable[[Any, Callable[[], None]], Any], argument: Any) -> int:
        """Run ``job`` as the newest request on the calling thread and deliver its outcome now."""
        with self._cond:
            self._generation += 1
            self._pending = None
            generation = self._generation

        def check():
            if not self.current(generation):
                raise Superseded()

        try:
            outcome = Outcome(generation, value=job(argument, check))
        except Superseded:
            return generation
        except Exception as exc:
            outcome = Outcome(generation, error=exc)
        with self._cond:
            if self.current(generation):
                self._finished = outcome
        self.deliver_ready()
        return generation

    def current(self, generation: int) -> bool:
        """Whether ``generation`` is still the newest request."""
        return generation == self._generation and not self._closed

    def close(self) -> None:
        """Stop the worker thread after its current job (whose outcome is dropped)."""
        with self._cond:
            self._closed = True
            self._pending = None
            self._cond.notify_all()

    # -- the worker ------------------------------------------------------------------------------
    def _loop(self) -> None:
        while True:
            with self._cond:
                while self._pending is None and not self._closed:
                    self._cond.wait()
                if self._closed:
                    return
                generation, job, argument = self._pending
                self._pending = None

            def check(generation=generation):
                if not self.current(generation):
                    raise Superseded()

            try:
                outcome = Outcome(generation, value=job(argument, check))
            except Superseded:
                continue
            except Exception as exc:  # shown to the user as the widget's error state
                outcome = Outcome(generation, error=exc)
            with self._cond:
                if not self.current(generation):
                    continue
                self._finished = outcome
                self._cond.notify_all()
            if self._post is None:
                self.deliver_ready()
            else:
                self._post(self.deliver_ready)

    # -- delivery --------------------------------------------------------------------------------
    def deliver_ready(self) -> None:
        """Deliver the newest finished outcome if it is current and not yet delivered (idempotent)."""
        with self._cond:
            outcome = self._finished
            if outcome is None or outcome.generation <= self._delivered:
                return
            if not self.current(outcome.generation):
                return
            self._delivered = outcome.generation
            self._deliver(outcome)
            self._cond.notify_all()

    def wait(self, timeout: float | None = None) -> bool:
        """Block until the newest request is delivered; deliver it here if its hand-off is queued.

        Returns False on timeout. Called on the kernel's main thread (where queued deliveries cannot
        run while it blocks), it delivers the finished outcome itself.
        """
        import time

        deadline = None if timeout is None else time.monotonic() + timeout
        with self._cond:
            while True:
                if self._delivered >= self._generation:
                    return True
                done = self._finished
                if done is not None and done.generation == self._generation:
                    break
                remaining = None if deadline is None else deadline - time.monotonic()
                if remaining is not None and remaining <= 0:
                    return False
                self._cond.wait(remaining if remaining is not None else 0.5)
        self.deliver_ready()
        return True
