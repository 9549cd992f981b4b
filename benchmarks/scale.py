"""The data path at 100,000 and 1,000,000 photos, figures printed next to their targets.

    python -m benchmarks.scale --n 100000 --actions 40       # through Project: store, vectors file, graph, verbs
    python -m benchmarks.scale --n 1000000 --engine-only     # graph on a memory-mapped features file

The collection: Fashion-MNIST's 70,000 photos (train + test splits, Debian dataset-fashion-mnist;
Xiao, Rasul, Vollgraf 2017) as a cheap stand-in feature (the 784 pixel values turned into 1,280
dimensions by a fixed random orthogonal map, which keeps every cosine similarity), so the engine's own
data path is what is timed; above 70,000 (and with --synthetic) synthetic clustered 1,280-d
embeddings with known classes (`synthetic`). Features go to a memory-mapped float32 file, as a
project keeps them.

Measured: graph ready (build from the features, in seconds), kNN recall@10 against exact search on
a sample (`neighbours.exact_rows`, the same as faiss IndexFlatIP over the prepared rows), the
neighbourhood entropy's error against the exact value on the same sample (mean, p95, max in nats),
and, through Project (not --engine-only): each decision plus the next proposals (median, p95),
reopen + status, peak memory (ru_maxrss, the whole process).
"""
from __future__ import annotations

import argparse
import os
import resource
import sys
import time
from pathlib import Path

import numpy as np

from core import neighbours

OUT = Path(os.environ.get("KINFOLD_SCALE_DIR", "/tmp/kinfold-scale"))
DIM = 1280


def peak_gb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024 ** 2


def synthetic(out: np.ndarray, classes: np.ndarray, start: int, seed: int = 0, n_classes: int = 100,
              modes: int = 6) -> None:
    """Fill out[start:] with clustered embeddings: class centre + one of `modes` sub-centres + noise,
    non-negative like pooled CNN features, L2-normalised; their classes into classes[start:]."""
    rng = np.random.default_rng(seed)
    d = out.shape[1]
    centres = rng.standard_normal((n_classes, d)).astype(np.float32)
    subs = centres[:, None, :] + 0.8 * rng.standard_normal((n_classes, modes, d)).astype(np.float32)
    for s in range(start, len(out), 50_000):
        e = min(s + 50_000, len(out))
        c = rng.integers(0, n_classes, e - s)
        m = rng.integers(0, modes, e - s)
        x = subs[c, m] + 1.6 * rng.standard_normal((e - s, d)).astype(np.float32)
        x = np.maximum(x, 0) + 0.05
        x /= np.linalg.norm(x, axis=1, keepdims=True)
        out[s:e] = x
        classes[s:e] = 10 + c


def fashion_stand_in(out: np.ndarray, classes: np.ndarray, n: int) -> int:
    """Fashion-MNIST train + test (up to n photos) as 1,280-d rows: pixels / 255 through a fixed
    random orthogonal 784 -> 1,280 map, L2-normalised. Returns how many rows were written."""
    from benchmarks.fashion import load_fashion_mnist

    rng = np.random.default_rng(1)
    q, _ = np.linalg.qr(rng.standard_normal((out.shape[1], 784)))
    q = q.T.astype(np.float32)                            # (784, d), orthonormal rows
    done = 0
    for split in ("train", "t10k"):
        if done >= n:
            break
        imgs, labs = load_fashion_mnist(None, split)
        take = min(len(labs), n - done)
        px = imgs[:take].reshape(take, -1).astype(np.float32) / 255.0
        x = px @ q
        x /= np.maximum(np.linalg.norm(x, axis=1, keepdims=True), 1e-12)
        out[done:done + take] = x
        classes[done:done + take] = labs[:take]
        done += take
    return done


def collection(n: int, use_fashion: bool, path: Path) -> tuple[np.ndarray, np.ndarray]:
    path.parent.mkdir(parents=True, exist_ok=True)
    feats = np.lib.format.open_memmap(path, mode="w+", dtype=np.float32, shape=(n, DIM))
    classes = np.zeros(n, np.int64)
    start = fashion_stand_in(feats, classes, min(n, 70_000)) if use_fashion else 0
    if start < n:
        synthetic(feats, classes, start)
    feats.flush()
    del feats
    return np.load(path, mmap_mode="r"), classes


def cpu_seconds() -> float:
    r = resource.getrusage(resource.RUSAGE_SELF)
    return r.ru_utime + r.ru_stime


def measure_graph(feats: np.ndarray, sample: int, k: int = 64, temperature: float = 0.1) -> dict:
    t0 = time.perf_counter()
    c0 = cpu_seconds()
    last = [0.0]

    def progress(done, total, message):
        now = time.perf_counter()
        if now - last[0] > 15:
            last[0] = now
            print(f"  {message}: {done:,}/{total:,} after {now - t0:.0f} s (peak {peak_gb():.2f} GB)", flush=True)

    g = neighbours.build_graph(feats, k=k, temperature=temperature, progress=progress)
    seconds = time.perf_counter() - t0
    cpu = cpu_seconds() - c0
    peak = peak_gb()
    rng = np.random.default_rng(7)
    q = np.sort(rng.choice(len(feats), min(sample, len(feats)), replace=False))
    t1 = time.perf_counter()
    _, ex_idx, ex_ent = neighbours.exact_rows(g.source, q, 10, temperature)
    ref_s = time.perf_counter() - t1
    recall = np.mean([len(set(g.idx[i, :10]) & set(ex_idx[r])) / 10 for r, i in enumerate(q)])
    err = np.abs(g.entropy[q].astype(np.float64) - ex_ent)
    return dict(graph=g, seconds=seconds, cpu=cpu, peak=peak, recall=recall, err_mean=err.mean(), err_p95=np.quantile(err, 0.95),
                err_max=err.max(), entropy_range=(float(ex_ent.min()), float(ex_ent.max())), ref_seconds=ref_s)


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--n", type=int, default=100_000)
    ap.add_argument("--actions", type=int, default=40)
    ap.add_argument("--sample", type=int, default=1000, help="photos recall and entropy error are measured on")
    ap.add_argument("--synthetic", action="store_true", help="synthetic only (no Fashion-MNIST rows)")
    ap.add_argument("--write-only", action="store_true", help=argparse.SUPPRESS)
    ap.add_argument("--engine-only", action="store_true", help="graph and its accuracy only, no Project")
    args = ap.parse_args(argv)
    n = args.n
    big = n > 100_000
    t_target = 20 * 60 if big else 120
    mem_target = 12 if big else 2
    if not args.write_only:
        print(f"python -m benchmarks.scale {' '.join(argv if argv is not None else sys.argv[1:])}")
    use_fashion = not args.synthetic
    t0 = time.perf_counter()
    path = OUT / f"features-{n}-{'f' if use_fashion else 's'}.npy"
    if args.write_only:
        _, classes = collection(n, use_fashion, path)
        np.save(path.with_suffix(".classes.npy"), classes)
        return 0
    # Written by a child process, so this one's peak memory is the engine's alone.
    import subprocess

    if not (path.exists() and path.with_suffix(".classes.npy").exists()):   # made once, then reused
        subprocess.run([sys.executable, "-m", "benchmarks.scale", "--n", str(n), "--write-only"]
                       + (["--synthetic"] if args.synthetic else []), check=True)
    feats, classes = np.load(path, mmap_mode="r"), np.load(path.with_suffix(".classes.npy"))
    print(f"collection: {n:,} x {DIM} ({min(n, 70_000) if use_fashion else 0:,} Fashion-MNIST stand-in, "
          f"the rest synthetic) written in {time.perf_counter() - t0:.0f} s; peak {peak_gb():.2f} GB", flush=True)
    if args.engine_only:
        r = measure_graph(feats, args.sample)
        print(f"graph ready          {r['seconds']:8.1f} s      target < {t_target} s   (process CPU time "
              f"{r['cpu']:.0f} s on {os.cpu_count()} cores, load average at the end {os.getloadavg()[0]:.1f})")
        print(f"recall@10            {r['recall']:8.3f}        target >= 0.95   (exact reference on {args.sample} photos, "
              f"{r['ref_seconds']:.0f} s)")
        print(f"entropy error mean   {r['err_mean']:8.4f} nats   target <= 0.05   (p95 {r['err_p95']:.4f}, max "
              f"{r['err_max']:.4f}; exact entropy range {r['entropy_range'][0]:.2f}-{r['entropy_range'][1]:.2f})")
        print(f"peak memory          {r['peak']:8.2f} GB     target < {mem_target} GB   (ru_maxrss after the graph, "
              f"features memory-mapped; {peak_gb():.2f} GB after the exact reference)")
        return 0
    from benchmarks.scale_project import run_project
    return run_project(args, feats, classes, t_target, mem_target)


if __name__ == "__main__":
    raise SystemExit(main())
