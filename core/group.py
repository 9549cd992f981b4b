"""`Group`: the one type a group of photos is handed out as, by `Project.propose`, `Project.group`
and `Project.split` (the window, the command line and the benchmarks all read this). `Proposal` is the
same type under its older name. Inside the engine, `core.proposals` forms groups over photo indices
before they get their stable ids and paths; the store keeps them as rows."""
from __future__ import annotations

from dataclasses import dataclass

from core import proposals


@dataclass
class Group:
    id: int
    members: list[str]                            # relative POSIX paths, anchor first
    trust: float
    suggested_label: str | None
    confidence: float | None
    kind: str                                     # "new area", "probable label" or "split part"

    @property
    def splittable(self) -> bool:
        """Whether `split` is offered: below MIN_SPLIT photos, taking members out is no more work."""
        return len(self.members) >= proposals.MIN_SPLIT


Proposal = Group       # the older name
