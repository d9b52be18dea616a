"""Background work: every heavy call runs in a Task on a thread pool and reports back by signal.

A Task is cancelled cooperatively: its function receives the task and polls
`task.should_stop()` (core's `should_stop=` hooks take it directly). Signals are queued
to the receiver's thread, so panels only ever touch widgets on the GUI thread.
"""

from __future__ import annotations

import threading
import traceback
from typing import Any, Callable

from PySide6.QtCore import QObject, QRunnable, QThreadPool, Signal

from core.deferred import torch
from core.errors import ChunkscopeError, SweepCancelled


class Task(QObject):
    progress = Signal(int, int)
    partial = Signal(object)
    finished = Signal(object)
    failed = Signal(str)
    cancelled = Signal()
    ended = Signal()  # after any of finished / failed / cancelled

    def __init__(self, name: str, fn: Callable[..., Any], *args: Any, **kwargs: Any):
        super().__init__()
        self.name = name
        self._fn, self._args, self._kwargs = fn, args, kwargs
        self._stop = threading.Event()
        self.done = threading.Event()

    def cancel(self) -> None:
        self._stop.set()

    def should_stop(self) -> bool:
        return self._stop.is_set()

    def report(self, done: int, total: int) -> None:
        self.progress.emit(int(done), int(total))

    def run(self) -> None:
        try:
            result = self._fn(self, *self._args, **self._kwargs)
            if self._stop.is_set():
                self.cancelled.emit()
            else:
                self.finished.emit(result)
        except SweepCancelled:
            self.cancelled.emit()
        except ChunkscopeError as exc:
            self.failed.emit(str(exc))
        except MemoryError:
            self.failed.emit(f"{self.name} ran out of memory.")
        except Exception as exc:  # a bug, not a user error: say what happened, keep the app alive
            traceback.print_exc()
            self.failed.emit(f"{self.name} failed unexpectedly: {type(exc).__name__}: {exc}")
        finally:
            self.done.set()
            self.ended.emit()


class _Runnable(QRunnable):
    def __init__(self, task: Task):
        super().__init__()
        self.task = task
        self.setAutoDelete(True)

    def run(self) -> None:
        # one core per task (the live view and a sweep run side by side); set in each pool
        # thread, since torch's intra-op thread count is kept per calling thread
        torch.set_num_threads(1)
        self.task.run()


class Runner(QObject):
    """Owns the thread pool and keeps every running Task alive until it ends."""

    def __init__(self, parent: QObject | None = None, threads: int = 3):
        super().__init__(parent)
        self.pool = QThreadPool(self)
        self.pool.setMaxThreadCount(threads)
        self._tasks: set[Task] = set()
        self._lock = threading.Lock()
        self._held: list[Task] | None = None

    def hold(self) -> None:
        """Queue tasks instead of starting them until `release` (the window's first paint
        comes before the first task imports torch, which would compete with it for the GIL)."""
        if self._held is None:
            self._held = []

    def release(self) -> None:
        held, self._held = self._held, None
        for task in held or []:
            self.pool.start(_Runnable(task))

    def start(self, task: Task) -> Task:
        with self._lock:
            self._tasks.add(task)
        task.ended.connect(lambda t=task: self._forget(t))
        if self._held is not None:
            self._held.append(task)
        else:
            self.pool.start(_Runnable(task))
        return task

    def _forget(self, task: Task) -> None:
        # only the task whose last signal this is: another finished task may still have signals queued
        with self._lock:
            self._tasks.discard(task)

    def running(self) -> list[Task]:
        with self._lock:
            return [t for t in self._tasks if not t.done.is_set()]

    def shutdown(self, timeout_ms: int = 5000) -> bool:
        """Cancel everything and wait for the threads; True when all stopped in time."""
        self._held = None  # never started: nothing to wait for
        for task in self.running():
            task.cancel()
        return self.pool.waitForDone(timeout_ms)


class LatestTask(QObject):
    """One slot for one kind of work where the latest request wins: starting a task cancels
    the one before, and only the latest task's signals reach the handlers, so a result for an
    old setting is never shown. The slot is empty (`task` is None) before an ending handler
    (finished, failed, cancelled) runs."""

    def __init__(self, runner: Runner, parent: QObject | None = None):
        super().__init__(parent)
        self.runner = runner
        self.task: Task | None = None

    def running(self) -> bool:
        return self.task is not None

    def busy(self) -> bool:
        """A task was started and its thread has not finished yet."""
        return self.task is not None and not self.task.done.is_set()

    def start(self, task: Task, *, progress: Callable | None = None, partial: Callable | None = None,
              finished: Callable | None = None, failed: Callable | None = None,
              cancelled: Callable | None = None) -> Task:
        self.drop()
        self.task = task
        for signal, handler in ((task.progress, progress), (task.partial, partial)):
            if handler is not None:
                signal.connect(lambda *args, t=task, h=handler: h(*args) if t is self.task else None)
        for signal, handler in ((task.finished, finished), (task.failed, failed), (task.cancelled, cancelled)):
            signal.connect(lambda *args, t=task, h=handler: self._ended(t, h, args))
        self.runner.start(task)
        return task

    def _ended(self, task: Task, handler: Callable | None, args: tuple) -> None:
        if task is not self.task:
            return  # superseded or dropped
        self.task = None
        if handler is not None:
            handler(*args)

    def cancel(self) -> None:
        """Ask the running task to stop; its `cancelled` handler still runs."""
        if self.task is not None:
            self.task.cancel()

    def drop(self) -> bool:
        """Stop the running task and ignore whatever it still sends; True if there was one."""
        task, self.task = self.task, None
        if task is not None:
            task.cancel()
        return task is not None
