"""Every engine call off the GUI thread: scans, relearning, exports, proposals and each decision.

A `Job` runs `work(progress, cancel)` on the one engine thread; the engine's plain progress callback
becomes a queued Qt signal, throttled so a fast loop cannot flood the GUI thread. Jobs run one at a
time, in the order started (they share one Project). `cancel_all` + `wait_all` end them all, so no job
outlives the folder it works on.
"""
from __future__ import annotations

import threading
import time
import traceback
from typing import Callable

from PySide6.QtCore import QObject, QRunnable, QThreadPool, Signal
from PySide6.QtWidgets import QHBoxLayout, QLabel, QProgressBar, QPushButton, QVBoxLayout, QWidget

_EMIT_EVERY = 0.05  # seconds between progress signals; the bar cannot show more than that anyway

# One thread for engine jobs: they share one Project, so they run one at a time.
_POOL = QThreadPool()
_POOL.setMaxThreadCount(1)
_POOL.setExpiryTimeout(-1)   # keep the thread: a decision every second should not start one each time
_LIVE: set["Job"] = set()    # started and not ended
_LIVE_LOCK = threading.Lock()


class Job(QObject):
    progress = Signal(int, int, str)
    finished = Signal(object)
    failed = Signal(str)

    def __init__(self, name: str, work: Callable, parent: QObject | None = None):
        super().__init__(parent)
        self.name = name
        self._work = work
        self._cancel = threading.Event()
        self._done = threading.Event()
        self._last = 0.0

    def start(self) -> "Job":
        """Queue the work. Connect to finished/failed before: the job deletes itself once it has
        delivered them."""
        job = self
        self.finished.connect(self.deleteLater)
        self.failed.connect(self.deleteLater)
        with _LIVE_LOCK:
            _LIVE.add(self)

        class _Run(QRunnable):
            def run(self):  # noqa: D401 - Qt entry point
                job._run()

        _POOL.start(_Run())
        return self

    def cancel(self) -> None:
        self._cancel.set()

    @property
    def cancelled(self) -> bool:
        return self._cancel.is_set()

    def wait(self, seconds: float | None = None) -> bool:
        return self._done.wait(seconds)

    def _report(self, done: int, total: int, message: str) -> None:
        now = time.monotonic()
        if now - self._last >= _EMIT_EVERY or done >= total:
            self._last = now
            self.progress.emit(int(done), int(total), str(message))

    def _run(self) -> None:
        try:
            result = self._work(self._report, self._cancel.is_set)
        except Exception as exc:  # the engine's one-line reason, or the unexpected error's text
            message = str(exc) or type(exc).__name__
            if not _is_expected(exc):
                traceback.print_exc()
            self._end()
            self.failed.emit(message)
            return
        self._end()
        self.finished.emit(result)

    def _end(self) -> None:
        with _LIVE_LOCK:
            _LIVE.discard(self)
        self._done.set()


def _is_expected(exc: Exception) -> bool:
    from core.export import ExportError
    from core.project import ProjectError
    from core.store import StoreError

    return isinstance(exc, (ProjectError, StoreError, ExportError, OSError, ValueError))


def running() -> bool:
    """Whether any job is queued or running."""
    with _LIVE_LOCK:
        return bool(_LIVE)


def cancel_all() -> None:
    """Ask every queued or running job to stop (each stops at its next cancellation point)."""
    with _LIVE_LOCK:
        live = list(_LIVE)
    for job in live:
        job.cancel()


def wait_all(seconds: float | None = None) -> bool:
    """Wait until every job has ended (None: however long that takes). True when none is left."""
    return _POOL.waitForDone(-1 if seconds is None else int(seconds * 1000))


class JobProgress(QWidget):
    """A bar with done / total, rate and time left, and a Cancel button."""

    def __init__(self, parent: QWidget | None = None, unit: str = "photos"):
        super().__init__(parent)
        self.unit = unit
        self.bar = QProgressBar()
        self.bar.setFormat("%v / %m")
        self.text = QLabel(" ")
        self.text.setObjectName("muted")
        self.cancel_button = QPushButton("Cancel")
        self.cancel_button.setToolTip("Stop early; the work done so far is kept")
        row = QHBoxLayout()
        row.addWidget(self.bar, 1)
        row.addWidget(self.cancel_button)
        lay = QVBoxLayout(self)
        lay.setContentsMargins(0, 0, 0, 0)
        lay.addLayout(row)
        lay.addWidget(self.text)
        self._job: Job | None = None
        self._t0 = 0.0
        self._phase_total = -1
        self._phase_start = 0
        self.cancel_button.clicked.connect(self._cancel)

    def attach(self, job: Job) -> None:
        self._job = job
        self._t0 = time.monotonic()
        self._phase_total = -1
        self.bar.setRange(0, 0)  # busy until the first report
        self.text.setText(f"{job.name}…")
        self.cancel_button.setEnabled(True)
        self.cancel_button.setText("Cancel")
        job.progress.connect(self.show_progress)

    def show_progress(self, done: int, total: int, message: str) -> None:
        now = time.monotonic()
        if total != self._phase_total or done < self._phase_start:
            # A new phase (reading files, then embedding): rate and time left start over.
            self._phase_total, self._phase_start, self._t0 = total, done, now
        self.bar.setRange(0, max(total, 1))
        self.bar.setValue(min(done, max(total, 1)))
        rate = (done - self._phase_start) / max(now - self._t0, 1e-6)
        parts = [message]
        if rate > 0 and now - self._t0 > 0.5:
            parts.append(f"{rate:.1f} {self.unit}/s")
            left = (total - done) / rate
            parts.append(f"about {_duration(left)} left" if done < total else "finishing")
        self.text.setText("  ·  ".join(parts))

    def _cancel(self) -> None:
        if self._job is not None:
            self._job.cancel()
            self.cancel_button.setEnabled(False)
            self.cancel_button.setText("Stopping…")


def _duration(seconds: float) -> str:
    if seconds < 60:
        return f"{max(seconds, 1):.0f} s"
    if seconds < 3600:
        return f"{seconds / 60:.0f} min"
    return f"{seconds / 3600:.1f} h"
