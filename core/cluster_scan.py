"""Embedding a scan's photos on a Dask cluster (Dask distributed, an optional dependency).

The scan itself (listing the folder, fingerprints, the catalogue) stays on this machine; only the
decode-and-embed work is sent out, in chunks of photos. Each worker process loads the extractor once
(a cached loader, keyed by model and precision) and returns vectors; only this process writes the
store, one chunk as it arrives, so progress and cancel work as in-process and a finished chunk is
never redone: the next scan starts from the photos whose embeddings are not stored.

Where the workers read the photos (``transfer``):
  "path"   every worker opens ``FOLDER/relative path`` itself: a shared filesystem mounted at the
           same place on every machine. The default whenever every worker sees the folder.
  "bytes"  this process reads each photo and sends its bytes with the chunk (through the scheduler),
           for workers that do not see the folder. It costs this machine's disk and network, and
           on this 2-core machine ran at a lower rate than "path" (see README, benchmarks/cluster_scan.py).
  "auto"   "path" if every worker sees the folder (checked on a sample photo: same size), else "bytes".

Faults: a chunk whose worker dies is recomputed elsewhere by Dask, and a chunk that raises is retried
(``retries=2``); a chunk that still fails leaves its photos for the next scan. A scheduler that goes
away ends the embedding with :class:`ClusterLost` (one line); what finished is already stored.

Results equal an in-process scan: the worker builds the extractor with the client's resolved
precision and checks the extractor id, and runs the same :func:`core.embedding.embed_files`.
"""
from __future__ import annotations

import io
import logging
import os
import threading
import time
import uuid
import warnings
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterator, Sequence

import numpy as np

Progress = Callable[[int, int, str], None]
Cancel = Callable[[], bool]

DEFAULT_CHUNK = 32           # photos per task: big enough to amortise the round trip, small enough to lose little
TRANSFERS = ("auto", "path", "bytes")
MAX_LOCAL_WORKERS = 256
CONNECT_SECONDS = 10         # reaching the scheduler
WORKER_WAIT_SECONDS = 60     # a scheduler with no workers yet
LOST_SECONDS = 5             # the client disconnected this long counts as the scheduler gone
_IN_FLIGHT_PER_WORKER = 2    # chunks submitted ahead per worker (bounds memory in "bytes" mode)


class ClusterError(Exception):
    """The cluster cannot be used (not installed, unreachable, no workers); one line."""


class ClusterLost(ClusterError):
    """The scheduler went away during the scan; what finished before is stored."""


def parse_target(value) -> None | str | int:
    """Where to embed: None (in this process), a number of local worker processes, a scheduler
    address "tcp://host:port" (or tls://), or an open distributed.Client (the caller closes it).
    Raises ValueError with a one-line reason."""
    if value is None or value is False:
        return None
    if type(value).__name__ == "Client" and hasattr(value, "submit"):  # a distributed.Client already open
        return value
    if isinstance(value, bool):
        raise ValueError("say where to embed: a number of worker processes or tcp://host:port")
    if isinstance(value, int):
        n = value
    else:
        text = str(value).strip()
        if text.lower() in ("", "this computer", "here", "in-process", "local"):
            return None
        if "://" in text:
            scheme, _, rest = text.partition("://")
            host, _, port = rest.rpartition(":")
            if scheme not in ("tcp", "tls") or not host or not port.isdigit() or not 0 < int(port) < 65536:
                raise ValueError(f"{text!r} is not a scheduler address; write it as tcp://HOST:PORT "
                                 f"(or tls://HOST:PORT)")
            return text
        if not text.isdigit():
            raise ValueError(f"{text!r}: give a number of worker processes or a scheduler address "
                             f"tcp://HOST:PORT")
        n = int(text)
    if not 1 <= n <= MAX_LOCAL_WORKERS:
        raise ValueError(f"the number of worker processes must be 1 to {MAX_LOCAL_WORKERS}, not {n}")
    return n


def describe(target) -> str:
    target = parse_target(target)
    if target is None:
        return "this process"
    if not isinstance(target, (int, str)):
        return f"the Dask scheduler at {_address(target)}"
    if isinstance(target, int):
        return f"{target} local worker process{'es' if target != 1 else ''}"
    return f"the Dask scheduler at {target}"


# --------------------------------------------------------------------------------------------
# Worker side
# --------------------------------------------------------------------------------------------
_LOADED: dict = {}
_LOAD_LOCK = threading.Lock()


def _worker_extractor(name: str, precision: str, threads: int | None):
    """The extractor of this worker process, built once (a second chunk reuses it)."""
    import torch

    with _LOAD_LOCK:
        if threads and torch.get_num_threads() != threads:
            torch.set_num_threads(threads)
        key = (name, precision)
        if key not in _LOADED:
            from core.embedding import get_extractor

            _LOADED[key] = get_extractor(name, precision)
        return _LOADED[key]


def _threads_for_this_host(threads_by_host: dict | None) -> int | None:
    if not threads_by_host:
        return None
    try:
        from distributed import get_worker

        host = get_worker().address.split("://")[-1].rsplit(":", 1)[0]
    except Exception:  # not on a worker (tests call the task directly)
        return None
    return threads_by_host.get(host)


def embed_chunk(items: Sequence, name: str, precision: str, expected_id: str,
                threads_by_host: dict | None = None, decode_workers: int | None = None) -> dict:
    """The task a worker runs: decode and embed one chunk. ``items`` are paths (str) the worker
    opens, or the photos' bytes. Returns plain data: indices embedded, their vectors, failures."""
    t0 = time.perf_counter()
    threads = _threads_for_this_host(threads_by_host)
    try:
        extractor = _worker_extractor(name, precision, threads)
    except (ValueError, OSError, ImportError) as exc:  # unknown name, weights missing, Kinfold not installed
        return dict(refused=f"a Dask worker cannot build the extractor {name!r}: {_one_line(exc)}")
    if extractor.id != expected_id:
        return dict(refused=f"a Dask worker's extractor is {extractor.id}, this scan's is {expected_id}; "
                            f"install the same Kinfold and weights on every worker")
    from core.embedding import embed_files

    sources = [io.BytesIO(x) if isinstance(x, (bytes, bytearray, memoryview)) else Path(x) for x in items]
    res = embed_files(sources, extractor, workers=decode_workers or threads)
    import torch

    return dict(ok=res.ok, vectors=res.vectors, failed=res.failed, retry=res.retry,
                seconds=time.perf_counter() - t0, threads=torch.get_num_threads(), pid=os.getpid())


def _sees(folder: str, relpath: str, size: int) -> bool:
    """Run on each worker: does it see the folder, with the sample photo at the same size?"""
    try:
        return os.stat(os.path.join(folder, relpath)).st_size == size
    except OSError:
        return False


# --------------------------------------------------------------------------------------------
# Client side
# --------------------------------------------------------------------------------------------
def _distributed():
    try:
        import distributed
    except ImportError:
        raise ClusterError("Dask distributed is not installed; install it with pip install "
                           "'kinfold[cluster]' (or 'dask[distributed]')") from None
    return distributed


@contextmanager
def connect(target, cancel: Cancel | None = None) -> Iterator:
    """A Dask client for ``target`` (see :func:`parse_target`). A number starts a LocalCluster of that
    many worker processes bound to 127.0.0.1 (one task each), stopped on leaving."""
    target = parse_target(target)
    if target is None:
        raise ValueError("no cluster given")
    if not isinstance(target, (int, str)):  # a Client the caller opened and closes
        yield target
        return
    distributed = _distributed()
    cluster = None
    try:
        if isinstance(target, int):
            try:
                with warnings.catch_warnings():  # "port 8787 is in use": its HTTP routes take another port
                    warnings.filterwarnings("ignore", message="Port .* is already in use")
                    cluster = distributed.LocalCluster(
                        n_workers=target, threads_per_worker=1, processes=True, host="127.0.0.1",
                        dashboard_address=None, silence_logs=logging.ERROR)
                client = distributed.Client(cluster, timeout=CONNECT_SECONDS)
            except Exception as exc:
                raise ClusterError(f"could not start {target} local worker processes: "
                                   f"{_one_line(exc)}") from None
        else:
            try:
                client = distributed.Client(target, timeout=CONNECT_SECONDS)
            except Exception as exc:
                raise ClusterError(f"cannot reach the Dask scheduler at {target}: {_one_line(exc)}") from None
        try:
            yield client
        finally:
            with _quiet():
                client.close(timeout=5)
    finally:
        if cluster is not None:
            with _quiet():
                cluster.close(timeout=10)


@contextmanager
def _quiet():
    try:
        yield
    except Exception:  # closing a client whose scheduler is gone may raise; nothing to save there
        pass


def _one_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text and text[0] else type(exc).__name__


@dataclass
class ClusterRun:
    embedded: int = 0
    failed: dict = field(default_factory=dict)    # fingerprint -> reason (not a readable photo)
    retry: dict = field(default_factory=dict)     # fingerprint -> reason (tried again next scan)
    cancelled: bool = False
    lost: str | None = None                       # one line: why the cluster went away mid-scan
    transfer: str = ""
    workers: int = 0
    chunk_seconds: list = field(default_factory=list)  # worker-side seconds per finished chunk
    chunk_sizes: list = field(default_factory=list)
    client_seconds: float = 0.0                   # this process's own work: reading bytes, storing vectors
    seconds: float = 0.0


def _threads_by_host(client, threads: int | None) -> dict:
    """Torch threads for each host: the host's cores shared among its worker processes' task slots
    (a LocalCluster of 2 workers on 2 cores: 1 each), or ``threads`` for every host when given."""
    info = client.scheduler_info().get("workers", {})
    slots: dict[str, int] = {}
    for addr, w in info.items():
        host = addr.split("://")[-1].rsplit(":", 1)[0]
        slots[host] = slots.get(host, 0) + int(w.get("nthreads", 1) or 1)
    if threads:
        return {h: int(threads) for h in slots}
    cores = client.run(os.cpu_count)
    out = {}
    for addr, n in cores.items():
        host = addr.split("://")[-1].rsplit(":", 1)[0]
        out[host] = max(1, int(n or 1) // max(1, slots.get(host, 1)))
    return out


def _wait_for_workers(client, cancel: Cancel | None, seconds: float) -> int:
    deadline = time.monotonic() + seconds
    while True:
        n = len(client.scheduler_info().get("workers", {}))
        if n:
            return n
        if cancel and cancel():
            return 0
        if time.monotonic() > deadline:
            raise ClusterError(f"no Dask workers joined the scheduler within {seconds:.0f} s; start some "
                               f"with: dask worker {client.scheduler.address}")
        time.sleep(0.2)


def embed_rows(folder: Path, rows: Sequence, extractor, store, target, *, progress: Progress | None = None,
               cancel: Cancel | None = None, chunk: int = DEFAULT_CHUNK, transfer: str = "auto",
               threads: int | None = None, client=None, extractor_name: str | None = None) -> ClusterRun:
    """Embed the photos ``rows`` (PhotoRow: path relative to ``folder``, fingerprint) on ``target``
    and store each chunk's vectors under ``extractor.id`` as it arrives. A :class:`ClusterError` is
    raised only before any work was sent; afterwards a lost scheduler is reported in ``run.lost``."""
    if transfer not in TRANSFERS:
        raise ValueError(f"transfer must be one of {TRANSFERS}, not {transfer!r}")
    if chunk < 1:
        raise ValueError("chunk must be at least 1 photo")
    if client is not None:
        return _embed_with(client, folder, rows, extractor, store, progress, cancel, chunk, transfer, threads,
                           extractor_name)
    with connect(target, cancel) as c:
        return _embed_with(c, folder, rows, extractor, store, progress, cancel, chunk, transfer, threads,
                           extractor_name)


def _embed_with(client, folder, rows, extractor, store, progress, cancel, chunk, transfer, threads,
                extractor_name) -> ClusterRun:
    distributed = _distributed()
    run = ClusterRun()
    total = len(rows)
    if not total:
        return run
    run.workers = _wait_for_workers(client, cancel, WORKER_WAIT_SECONDS)
    if not run.workers:
        run.cancelled = True
        return run
    folder = Path(folder)
    if transfer == "auto":
        sample = rows[0]
        try:
            size = os.stat(folder / sample.path).st_size
        except OSError:
            size = -1
        seen = client.run(_sees, str(folder), sample.path, size)
        transfer = "path" if seen and all(seen.values()) else "bytes"
    run.transfer = transfer
    by_host = _threads_by_host(client, threads)
    name, _, _ = extractor.id.partition(":")
    precision = getattr(extractor, "precision", "auto")
    # The built-in EfficientNet-Lite0 extractors carry the name that builds them; otherwise the id starts
    # with the name, torchvision ids with "torchvision-<arch>".
    model = extractor_name or getattr(extractor, "name", None) or (
        name if not name.startswith("torchvision-") else _torchvision_name(name))
    chunks = [list(rows[i:i + chunk]) for i in range(0, total, chunk)]
    tag = uuid.uuid4().hex[:8]
    in_flight: dict = {}       # future -> chunk index
    unread: dict[int, list] = {}  # chunk index -> [(position, reason, retry)] read failures on this side
    next_chunk = 0
    n_bad = 0
    t_start = time.perf_counter()

    def report(state: str | None = None) -> None:
        if progress:
            progress(run.embedded + n_bad, total, f"embedded {run.embedded} of {total} photos" if state is None
                     else f"{state}: {run.embedded} embedded, {n_bad} could not be read")

    def items_of(k: int) -> list:
        if transfer == "path":
            return [str(folder / r.path) for r in chunks[k]]
        from core.images import PhotoError, open_regular

        out, bad = [], []
        for pos, r in enumerate(chunks[k]):
            try:
                with open_regular(folder / r.path) as fh:
                    out.append(fh.read())
            except PhotoError as exc:
                bad.append((pos, str(exc), exc.retry))
                out.append(b"")  # keeps positions; never decoded (reported from here instead)
            except OSError as exc:
                bad.append((pos, f"cannot read the file: {exc.strerror or exc}", True))
                out.append(b"")
        unread[k] = bad
        return out

    def submit(k: int) -> None:
        t0 = time.perf_counter()
        items = items_of(k)
        run.client_seconds += time.perf_counter() - t0
        with warnings.catch_warnings():  # bytes mode sends the photos in the task: large by design
            warnings.filterwarnings("ignore", message="Sending large graph")
            fut = client.submit(embed_chunk, items, model, precision, extractor.id, by_host,
                                key=f"kinfold-embed-{tag}-{k}", retries=2, pure=False)
        in_flight[fut] = k

    def top_up() -> None:
        nonlocal next_chunk
        ahead = max(2, _IN_FLIGHT_PER_WORKER * max(1, len(client.scheduler_info().get("workers", {}))))
        while next_chunk < len(chunks) and len(in_flight) < ahead:
            submit(next_chunk)
            next_chunk += 1

    def give_up(k: int, reason: str) -> None:
        nonlocal n_bad
        for r in chunks[k]:
            run.retry[r.fingerprint] = reason
        n_bad += len(chunks[k])

    report()
    disconnected_since = None
    try:
        top_up()
        while in_flight:
            if cancel and cancel():
                run.cancelled = True
                break
            done = set()
            if _connected(client):
                try:
                    done = distributed.wait(list(in_flight), timeout=0.25, return_when="FIRST_COMPLETED").done
                except TimeoutError:  # nothing finished within the poll interval
                    pass
                except Exception:  # futures cancelled (the scheduler connection dropped, say): looked at below
                    done = {f for f in in_flight if f.status == "cancelled"}
                    if done:
                        time.sleep(0.5)  # the client notices a lost connection a moment after its futures
            if not _connected(client):
                disconnected_since = disconnected_since or time.monotonic()
                if time.monotonic() - disconnected_since > LOST_SECONDS:
                    raise ClusterLost("lost")
                time.sleep(0.1)
                continue
            disconnected_since = None
            for fut in done:
                k = in_flight.pop(fut)
                if fut.status == "finished":
                    out = fut.result()
                    if "refused" in out:
                        raise ClusterError(out["refused"])
                    rows_k = chunks[k]
                    bad_here = {pos: (reason, again) for pos, reason, again in unread.pop(k, [])}
                    fps = [rows_k[i].fingerprint for i in out["ok"] if i not in bad_here]
                    keep = [j for j, i in enumerate(out["ok"]) if i not in bad_here]
                    vectors = np.asarray(out["vectors"], dtype=np.float32)[keep]
                    t0 = time.perf_counter()
                    store.put_embeddings(extractor.id, fps, vectors)
                    run.client_seconds += time.perf_counter() - t0
                    run.embedded += len(fps)
                    for pos, (reason, again) in bad_here.items():
                        (run.retry if again else run.failed)[rows_k[pos].fingerprint] = reason
                    for i, reason in out["failed"]:
                        if i not in bad_here:
                            run.failed[rows_k[i].fingerprint] = reason
                    for i, reason in out["retry"]:
                        if i not in bad_here:
                            run.retry[rows_k[i].fingerprint] = reason
                    n_bad += len(rows_k) - len(fps)
                    run.chunk_seconds.append(float(out["seconds"]))
                    run.chunk_sizes.append(len(rows_k))
                elif fut.status == "cancelled" and not _connected(client):
                    in_flight[fut] = k  # the scheduler connection dropped; decided above
                    continue
                else:
                    unread.pop(k, None)
                    give_up(k, f"the cluster could not embed it ({_future_reason(fut)})")
                report()
            if not run.cancelled:
                top_up()
    except ClusterLost:
        run.lost = (f"lost the Dask scheduler at {_address(client)} after {run.embedded} of {total} photos; "
                    f"those are stored, run the scan again to carry on")
    except ClusterError as exc:  # a worker refused the work (cannot build the same extractor)
        run.lost = f"{exc}; {run.embedded} of {total} photos embedded and stored"
    except OSError as exc:
        run.lost = (f"the Dask scheduler at {_address(client)} stopped answering ({_one_line(exc)}) after "
                    f"{run.embedded} of {total} photos; those are stored, run the scan again to carry on")
    finally:
        if in_flight:
            with _quiet():
                client.cancel(list(in_flight), force=True)
    if run.cancelled:
        report("cancelled")
    elif run.lost is None:
        report("done")
    run.seconds = time.perf_counter() - t_start
    return run


def _connected(client) -> bool:
    return client.status == "running"


def _address(client) -> str:
    try:
        return client.scheduler.address
    except Exception:
        return "its address"


def _future_reason(fut) -> str:
    try:
        exc = fut.exception(timeout=1)
    except Exception as err:
        return _one_line(err)
    return f"{type(exc).__name__}: {_one_line(exc)}" if exc is not None else fut.status


def _torchvision_name(name: str) -> str:
    """'torchvision-resnet18' -> the short name get_extractor takes."""
    from core.embedding import TORCHVISION_MODELS

    arch = name[len("torchvision-"):]
    return next((short for short, a in TORCHVISION_MODELS.items() if a == arch), arch)
