"""`FolderLock`: one process at a time changes a project. An advisory lock (flock) on a file in the
store folder; the operating system drops it when the process ends, so a crash leaves no stale lock."""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

from core.errors import FolderInUse


@dataclass
class FolderLock:
    path: Path
    handle: object = field(default=None, repr=False)

    def acquire(self) -> None:
        try:
            import fcntl
        except ImportError:  # not POSIX: no cross-process lock
            return
        self.handle = open(self.path, "a+")
        try:
            fcntl.flock(self.handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            self.handle.close()
            self.handle = None
            raise FolderInUse(f"this folder is already open in another Kinfold window or command "
                              f"(lock {self.path}); close it there first") from None

    def release(self) -> None:
        if self.handle is not None:
            self.handle.close()
            self.handle = None
