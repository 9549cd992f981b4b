"""The one atomic-write helper: a file is written under a temporary name beside its destination and
moved into place with `os.replace`, so a reader (or a crash) sees the old file or the new one whole,
never half of one."""
from __future__ import annotations

import contextlib
import os
import threading
from pathlib import Path
from typing import Callable, Iterator


@contextlib.contextmanager
def replacing(path, suffix: str = "") -> Iterator[Path]:
    """`with replacing(dest) as tmp:` write `tmp`; on leaving the block without an error it replaces
    `dest`, on an error it is removed and `dest` is untouched. `suffix` ends the temporary's name (some
    writers choose the format by it, e.g. ".npz")."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.{os.getpid()}-{threading.get_ident()}.tmp{suffix}")
    try:
        yield tmp
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink(missing_ok=True)
        raise


def write_bytes(path, data: bytes) -> None:
    """Write `data` to `path` atomically."""
    with replacing(path) as tmp:
        tmp.write_bytes(data)


def write_with(path, writer: Callable[[Path], None], suffix: str = "") -> None:
    """Call `writer(tmp)` to write the file, then move it to `path` atomically."""
    with replacing(path, suffix) as tmp:
        writer(tmp)
