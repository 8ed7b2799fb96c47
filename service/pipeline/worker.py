"""The worker loop: a list of periodic tasks, each a function that returns how much work it did.

``tallyward worker`` runs it in its own process (``TALLYWARD_SCORING=worker``); ``tallyward
serve`` with ``TALLYWARD_SCORING=inline`` runs the same loop in a thread of the API process.
Workers share work only through the database (leases, ``FOR UPDATE SKIP LOCKED``): start as
many as needed; a killed one's claims expire and another takes them over.

The tasks take turns in one thread. A task that did work runs again at once (after the others
had their turn); one that found nothing waits ``every_s``. Each turn is short (one scoring
pass, one detector's fit), so a long fit job or a night of refits never holds scoring up for
more than one detector's fit. Adding a task is one line in ``default_tasks``.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from service.config import Settings
from service.pipeline import jobs
from service.pipeline.retention import maintain_storage
from service.pipeline.score import ScoringCache, score_pass

log = logging.getLogger("tallyward.worker")

REFIT_CHECK_S = 60.0  # seconds between looks for due refit schedules when none was due


@dataclass
class PeriodicTask:
    """A unit of a worker's work: ``run()`` returns how much it did (0 = nothing to do)."""

    name: str
    every_s: float  # seconds to wait after a run that found nothing
    run: Callable[[], int]
    wakes: bool = False  # also run when the worker is woken (new counts committed)
    next_at: float = 0.0  # monotonic seconds


MAINTAIN_EVERY_S = 3600.0  # storage upkeep: partitions are made days ahead, so hourly is ample


def default_tasks(engine: Any, settings: Settings, *, refits: bool, storage: bool = False
                  ) -> list[PeriodicTask]:
    """Scoring (with the missing-data sweep: intervals that became due without data are
    scored as missing), fit jobs, with ``refits`` the rolling refit schedule and, with
    ``storage`` (``tallyward worker`` only: its partition DDL must not run beside the inline
    runner's own ingest), hourly storage upkeep."""
    cache = ScoringCache()  # parsed baselines and thresholds, for the worker's life
    poll = settings.worker_poll_s
    tasks = [
        PeriodicTask("score", poll, lambda: score_pass(
            engine, settings, limit=settings.scoring_batch, cache=cache), wakes=True),
        PeriodicTask("fit_jobs", poll, lambda: jobs.run_job_items(engine, settings)),
    ]
    if refits:
        tasks.append(PeriodicTask("refits", REFIT_CHECK_S,
                                  lambda: jobs.run_refits(engine, settings)))
    if storage:
        tasks.append(PeriodicTask("storage", MAINTAIN_EVERY_S,
                                  lambda: _maintain(engine, settings)))
    return tasks


def _maintain(engine: Any, settings: Settings) -> int:
    """Storage upkeep (partitions ahead of the clock, hourly totals, expiry); 0: it never
    asks for an immediate next turn."""
    maintain_storage(engine, settings)
    return 0


def refits_enabled(settings: Settings, *, in_worker: bool) -> bool:
    """TALLYWARD_REFITS: 'auto' is nightly in a worker process, off in the inline runner."""
    return settings.refits == "nightly" or (settings.refits == "auto" and in_worker)


def one_blas_thread() -> None:
    """Limit BLAS (OpenBLAS) to one thread in this process, as ``fit_many``'s worker processes
    do. Measured (/tmp micro-benchmark, 2 busy cores, deriving one detector's thresholds):
    0.16-0.63 s wall with one BLAS thread against 3.7-17.8 s with OpenBLAS's default two;
    its threads spin on small matrices. This was why fits through the API (in the API process,
    default BLAS threads) ran 8-26x slower than `tallyward fit --workers N`. Workers scale by
    processes instead."""
    from threadpoolctl import threadpool_limits

    threadpool_limits(1)


class Worker:
    """Runs its tasks in turn until stopped (``run`` in this thread, ``start`` in a new one)."""

    def __init__(self, tasks: list[PeriodicTask], *, name: str = "tallyward-worker") -> None:
        self.tasks = tasks
        self.name = name
        self.wake = threading.Event()
        self.stop_event = threading.Event()
        self.thread: threading.Thread | None = None

    def start(self) -> Worker:
        self.thread = threading.Thread(target=self.run, name=self.name, daemon=True)
        self.thread.start()
        return self

    def stop(self, timeout_s: float = 30.0) -> None:
        self.stop_event.set()
        self.wake.set()
        if self.thread is not None:
            self.thread.join(timeout_s)

    def run_round(self) -> int:
        """One turn of every task that is due; the work they did."""
        if self.wake.is_set():
            self.wake.clear()
            for task in self.tasks:
                if task.wakes:
                    task.next_at = 0.0
        total = 0
        for task in self.tasks:
            if self.stop_event.is_set():
                break
            if task.next_at > time.monotonic():
                continue
            try:
                done = int(task.run() or 0)
            except Exception:  # noqa: BLE001 - a failing task must not stop the others; logged
                log.exception("worker task failed", extra={"fields": {"task": task.name}})
                done = 0
            task.next_at = time.monotonic() + (0.0 if done else task.every_s)
            total += done
        return total

    def run(self) -> None:
        while not self.stop_event.is_set():
            if self.run_round() == 0 and not self.stop_event.is_set():
                wait = min(t.next_at for t in self.tasks) - time.monotonic()
                if wait > 0:
                    self.wake.wait(wait)

    def run_until_idle(self, *, max_rounds: int = 100_000) -> int:
        """Rounds of every task (due or not) until none finds work; the work done."""
        total = 0
        for _ in range(max_rounds):
            for task in self.tasks:
                task.next_at = 0.0
            done = self.run_round()
            if done == 0:
                break
            total += done
        return total
