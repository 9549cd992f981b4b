"""The engine's one error for requests it refuses: the message says why, in one line, and the front
ends show it as it is (no traceback)."""
from __future__ import annotations


class ProjectError(Exception):
    """A request Kinfold cannot carry out; the message says why, in one line."""


class FolderInUse(ProjectError):
    """The folder's project is open in another Kinfold window or command (its lock is held)."""
