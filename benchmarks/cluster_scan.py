"""Scanning on a Dask cluster: photos/s in-process, on 1 and on 2 local worker processes, in one run.

    python -m benchmarks.cluster_scan --count 128 --chunk 16

On the 12-megapixel JPEGs of benchmarks/embed_throughput.py (generated once, cached). Measured:
  limit        1 / (model + decode / cores): this machine's ceiling (as in embed_throughput)
  in-process   core.embedding.embed_files on all the photos
  N workers    core.cluster_scan.embed_rows on a LocalCluster of N worker processes (127.0.0.1), the
               client storing every chunk in a real store; workers warmed up first (model loaded), so
               the rate is steady-state. Torch threads per worker: cores / N ("pinned"); the 2-worker
               run is repeated unpinned (each worker keeps cores threads) and with bytes sent from the
               client instead of the shared path.
  efficiency   rate(2 workers) / (2 x rate(1 worker)); target >= 0.8 where cores allow
  MODEL        an 8-worker cluster of machines like this one, from the measured per-chunk times: each
               worker alone on its machine does a chunk in the 1-worker run's median chunk time; the
               client's own work per chunk (reading bytes, storing vectors) and the scheduler's round
               trip per chunk are the measured ones. A model, not a measurement.
"""
from __future__ import annotations

import argparse
import os
import shutil
import statistics
import sys
import tempfile
import time
from collections import namedtuple
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

Row = namedtuple("Row", "path fingerprint")


def _limit(paths, extractor, batch_size=32) -> tuple[float, float, float]:
    """(model s/photo wall, decode s/photo CPU, limit photos/s) as embed_throughput measures them."""
    import numpy as np
    import torch

    from core.images import load_rgb

    cpu, tensors = [], []
    for path in paths[:48]:
        t0 = time.process_time()
        x = extractor.preprocess(load_rgb(path, min_side=extractor.decode_side))
        cpu.append(time.process_time() - t0)
        tensors.append(x)
    decode_s = float(np.mean(cpu))
    batches = [torch.stack(tensors[i:i + batch_size]) for i in range(0, len(tensors), batch_size)]
    extractor.embed(batches[0])
    done, t0 = 0, time.perf_counter()
    while done < 192:
        for b in batches:
            extractor.embed(b)
            done += len(b)
    model_s = (time.perf_counter() - t0) / done
    cores = os.cpu_count() or 1
    return model_s, decode_s, 1.0 / (model_s + decode_s / cores)


def _cluster_run(n_workers, folder, rows, extractor, chunk, transfer, threads, store_dir):
    import distributed

    from core import cluster_scan
    from core.store import Store

    cluster = distributed.LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True,
                                       host="127.0.0.1", dashboard_address=None, silence_logs=50)
    client = distributed.Client(cluster)
    try:
        warm_dir = Path(tempfile.mkdtemp(dir=store_dir))
        warm = Store(warm_dir)
        # Warm-up: every worker loads the extractor once (one chunk each), outside the timing.
        cluster_scan.embed_rows(folder, rows[:n_workers], extractor, warm, client, chunk=1,
                                transfer=transfer, threads=threads, client=client)
        warm.close()
        st = Store(Path(tempfile.mkdtemp(dir=store_dir)))
        t0 = time.perf_counter()
        run = cluster_scan.embed_rows(folder, rows, extractor, st, client, chunk=chunk, transfer=transfer,
                                      threads=threads, client=client)
        wall = time.perf_counter() - t0
        st.close()
        torch_threads = sorted(set(client.run(_torch_threads).values()))
    finally:
        client.close()
        cluster.close()
    assert run.embedded == len(rows), (run.embedded, run.retry)
    return wall, run, torch_threads


def _torch_threads():
    import torch

    return torch.get_num_threads()


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--count", type=int, default=128)
    ap.add_argument("--chunk", type=int, default=16)
    ap.add_argument("--model-workers", type=int, default=8)
    ap.add_argument("--link-mbit", type=float, default=1000.0,
                    help="the client's network link assumed by the MODEL in bytes mode (Mbit/s)")
    args = ap.parse_args(argv)
    print("command: python -m benchmarks.cluster_scan " + " ".join(sys.argv[1:] if argv is None else argv))

    from benchmarks.embed_throughput import generated_photos
    from core.embedding import embed_files, get_extractor

    paths = [Path(p) for p in generated_photos(args.count)]
    folder = paths[0].parent
    rows = [Row(p.name, f"fp-{i}") for i, p in enumerate(paths)]
    n = len(rows)
    cores = os.cpu_count() or 1
    extractor = get_extractor("efficientnet-lite0")
    print(f"{n} photos 4000x3000 JPEG, chunk {args.chunk}, extractor {extractor.id}, {cores} cores, "
          f"load average at start {os.getloadavg()[0]:.1f}")

    model_s, decode_s, limit = _limit(paths, extractor)
    embed_files(paths[:8], extractor)  # warm
    t0 = time.perf_counter()
    res = embed_files(paths, extractor)
    inproc = n / (time.perf_counter() - t0)
    assert len(res.ok) == n

    store_dir = Path(tempfile.mkdtemp(prefix="kinfold-cluster-bench-"))
    results = {}
    try:
        for label, workers, transfer, threads in (
                ("1 worker", 1, "path", None),
                ("2 workers", 2, "path", None),
                ("2 workers unpinned", 2, "path", cores),
                ("2 workers, bytes", 2, "bytes", None)):
            wall, run, tt = _cluster_run(workers, folder, rows, extractor, args.chunk, transfer, threads, store_dir)
            results[label] = (n / wall, wall, run, tt)
    finally:
        shutil.rmtree(store_dir, ignore_errors=True)

    print(f"model only      {model_s * 1000:7.1f} ms/photo wall; decode {decode_s * 1000:.1f} ms/photo CPU")
    print(f"limit           {limit:7.1f} photos/s = 1 / (model + decode / {cores})")
    print(f"in-process      {inproc:7.1f} photos/s   ({inproc / limit:.2f} of limit)")
    for label, (rate, wall, run, tt) in results.items():
        med = statistics.median(run.chunk_seconds)
        print(f"{label:<19} {rate:5.1f} photos/s   ({rate / limit:.2f} of limit, {wall:.1f} s, torch threads/worker "
              f"{tt}, median chunk {med:.2f} s on the worker, client's own work {run.client_seconds:.2f} s)")
    r1 = results["1 worker"][0]
    r2 = results["2 workers"][0]
    print(f"efficiency      {r2 / (2 * r1):.2f} = rate(2) / (2 x rate(1))  (target >= 0.8 where cores allow; "
          f"{cores} cores here, so 2 workers share the cores 1 worker already used)")
    print(f"unpinned / pinned (2 workers)   {results['2 workers unpinned'][0] / r2:.2f}")
    print(f"bytes / path (2 workers)        {results['2 workers, bytes'][0] / r2:.2f}")

    # The MODEL: machines like this one, one worker each (all its cores), one client.
    _, wall1, run1, _ = results["1 worker"]
    k = args.model_workers
    chunk_s = statistics.median(run1.chunk_seconds)
    chunks = len(run1.chunk_seconds)
    # What the 1-worker run spent per chunk beyond the worker's own work: scheduler round trip, transfer,
    # the client storing vectors (measured; it serialises on the client in any cluster size).
    overhead = max(0.0, wall1 / chunks - chunk_s)
    client_path = run1.client_seconds / chunks
    client_bytes = results["2 workers, bytes"][2].client_seconds / len(results["2 workers, bytes"][2].chunk_seconds)
    workers_rate = k * args.chunk / (chunk_s + overhead)
    photo_bytes = statistics.mean(p.stat().st_size for p in paths)
    link_rate = args.link_mbit * 1e6 / 8 / photo_bytes   # every photo's bytes leave the client once
    print(f"MODEL (not a measurement): {k} machines like this one, 1 worker each, the load as in this run; "
          f"photos {photo_bytes / 1e6:.1f} MB on average; bytes mode over an assumed {args.link_mbit:.0f} Mbit/s "
          f"client link")
    for label, per_chunk, link in (("path", client_path, None), ("bytes", client_bytes, link_rate)):
        client_rate = args.chunk / per_chunk if per_chunk > 0 else float("inf")
        rate = min(workers_rate, client_rate, link or float("inf"))
        extra = f", link {link:.0f}/s" if link else ""
        print(f"MODEL {k} workers ({label}): {rate:6.1f} photos/s = min({k} x {args.chunk} / ({chunk_s:.2f} s chunk "
              f"+ {overhead:.2f} s round trip), client {client_rate:.0f}/s from {per_chunk * 1000:.0f} ms/chunk"
              f"{extra}); efficiency {rate / (k * r1):.2f} vs {k} x the 1-worker rate")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
