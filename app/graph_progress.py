"""The neighbour graph built before anything needs it, shown and cancellable in both front ends.

The first proposals after a scan, a relearn or a stopped build need the neighbour graph, which takes
minutes at 100,000 photos. `Project.prepare_graph(progress, cancel)` builds (or loads) it with progress
and stops with `neighbours.Cancelled`; this module runs it where the user sees it:

- the window: `prepare_then(project, progress, cancel, then)` is the work of one engine job (the graph
  first, with progress in plain words, then `then()`, the view to show); a cancel returns `Stopped`;
- the command line: `prepare_on_terminal(project, quiet)` shows the scan's progress bar on a terminal
  and turns Ctrl+C into `GraphInterrupted` (the verb ends with one line and status 130; nothing was
  decided, and no partial graph is kept).

No Qt here: the window's widgets show what these report.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

from core import neighbours

# The engine's progress messages during a build, in the words the front ends show.
WORDS = {"finding neighbours": "Finding neighbours", "dividing the collection": "Dividing the collection"}
FORMING = "forming groups"


def words(message: str) -> str:
    """The plain words for a build's progress message (unknown messages as they are, capitalised)."""
    return WORDS.get(message, message[:1].upper() + message[1:])


def describe(done: int, total: int, message: str) -> str:
    """One line for the window: "Finding neighbours: 40,000 of 100,000 photos"."""
    return f"{words(message)}: {done:,} of {total:,} photos"


@dataclass
class Stopped:
    """A build stopped by its cancel: how far it had got, and what the window shows meanwhile (the
    status and chart, no groups)."""
    done: int
    total: int
    message: str
    view: object = None

    def line(self) -> str:
        if self.total:
            where = f" at {self.done:,} of {self.total:,} photos" if self.done else " before it began"
        else:
            where = ""
        return f"Finding neighbours was stopped{where}, so no groups are formed yet."


def prepare_then(project, progress, cancel, then: Callable[[], object], stopped_view: Callable[[], object] | None = None):
    """Engine-thread work: load or build the graph with progress (plain words), then return `then()`.
    A cancel returns `Stopped` carrying `stopped_view()` (what can be shown without the graph)."""
    last = [0, 0, ""]

    def report(done: int, total: int, message: str) -> None:
        last[:] = [done, total, message]
        progress(done, total, describe(done, total, message))

    try:
        project.prepare_graph(progress=report, cancel=cancel)
    except neighbours.Cancelled:
        return Stopped(*last, view=stopped_view() if stopped_view is not None else None)
    progress(0, 0, FORMING)
    return then()


class GraphInterrupted(Exception):
    """Ctrl+C while the command line was finding neighbours."""

    def __str__(self) -> str:
        return "interrupted while finding neighbours; nothing was changed, run the command again to go on"


def prepare_on_terminal(project, quiet: bool = False) -> None:
    """Load or build the graph before a verb needs it: the scan's progress bar on a terminal (none with
    `quiet` or when stderr is not one); the first Ctrl+C stops the build (`GraphInterrupted`)."""
    from app.cli import _Bar, _InterruptToCancel   # the bar and the Ctrl+C handling the scan uses

    bar = _Bar(not quiet)
    with _InterruptToCancel() as interrupt:
        try:
            project.prepare_graph(progress=lambda d, t, m: bar(d, t, words(m)), cancel=interrupt.asked.is_set)
        except neighbours.Cancelled:
            if bar.enabled:
                import sys

                sys.stderr.write("\n")
            raise GraphInterrupted() from None
