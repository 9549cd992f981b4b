"""How promptly the neighbour graph's build reports and stops: the progress a window or terminal shows
and the wait after Cancel / Ctrl+C (issue 18: "the graph built in chunks with progress and cancel").

    python -m benchmarks.graph_cancel [--n 100000 --dim 1280 --cancel-at 5,30]

On synthetic clustered embeddings (float32, L2-normalised, 200 clusters), in one run: a whole build
with the time of every progress report (the time before the first one, the longest gap between two:
what a cancel can wait at most, since the build checks it before each round of blocks), then one build
per --cancel-at second, cancelled then, with the wait from the cancel to `neighbours.Cancelled`.
Targets (the window's and the terminal's Cancel): a report at least every 2 s after the first, and a
cancel honoured within 2 s. The build is `neighbours.build_graph`, the same call `Project.prepare_graph`
makes through core/geometry.py.
"""
from __future__ import annotations

import argparse
import sys
import threading
import time

import numpy as np

from core import geometry, neighbours

TARGET_GAP = 2.0
TARGET_CANCEL = 2.0


def features(n: int, dim: int, seed: int = 0) -> np.ndarray:
    rng = np.random.default_rng(seed)
    centres = rng.normal(size=(200, dim)).astype(np.float32)
    x = np.empty((n, dim), np.float32)
    for s in range(0, n, 20000):
        m = min(20000, n - s)
        x[s:s + m] = centres[rng.integers(0, 200, m)] + 0.6 * rng.normal(size=(m, dim)).astype(np.float32)
    x /= np.linalg.norm(x, axis=1, keepdims=True)
    return x


def whole(x: np.ndarray) -> tuple[float, list[tuple[float, int, int, str]]]:
    reports = []
    t0 = time.perf_counter()
    neighbours.build_graph(x, **geometry.GRAPH_SETTINGS,
                           progress=lambda d, t, m: reports.append((time.perf_counter() - t0, d, t, m)))
    return time.perf_counter() - t0, reports


def cancelled_at(x: np.ndarray, seconds: float) -> tuple[float, str, int] | None:
    """Cancel after `seconds`: (wait from the cancel to Cancelled, the phase it was in, photos done);
    None when the build ended first."""
    asked = threading.Event()
    last = ["starting", 0]

    def report(d, t, m):
        last[:] = [m, d]

    timer = threading.Timer(seconds, asked.set)
    t0 = time.perf_counter()
    timer.start()
    try:
        neighbours.build_graph(x, **geometry.GRAPH_SETTINGS, progress=report, cancel=asked.is_set)
    except neighbours.Cancelled:
        return time.perf_counter() - t0 - seconds, last[0], last[1]
    finally:
        timer.cancel()
    return None


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(prog="python -m benchmarks.graph_cancel", description=__doc__.split("\n\n")[0])
    ap.add_argument("--n", type=int, default=100_000)
    ap.add_argument("--dim", type=int, default=1280)
    ap.add_argument("--cancel-at", default="5,30", help="seconds into a build at which to cancel, comma-separated")
    args = ap.parse_args(argv)
    print(f"command: python -m benchmarks.graph_cancel --n {args.n} --dim {args.dim} --cancel-at {args.cancel_at}")
    x = features(args.n, args.dim)
    seconds, reports = whole(x)
    times = [r[0] for r in reports]
    gaps = np.diff(times) if len(times) > 1 else np.array([0.0])
    phases = sorted({r[3] for r in reports}, key=lambda m: [r[3] for r in reports].index(m))
    print(f"whole build of {args.n:,} x {args.dim}: {seconds:.1f} s, {len(reports)} progress reports "
          f"({', '.join(phases)})")
    print(f"  first report after {times[0]:.2f} s (before it: the sample's projection and k-means, or the first round)")
    print(f"  longest gap between reports {gaps.max():.2f} s (median {np.median(gaps):.2f} s)   "
          f"target <= {TARGET_GAP:.0f} s: {'met' if gaps.max() <= TARGET_GAP else 'NOT met'}")
    for at in [float(v) for v in args.cancel_at.split(",") if v.strip()]:
        got = cancelled_at(x, at)
        if got is None:
            print(f"cancel at {at:.0f} s: the build had ended")
            continue
        wait, phase, done = got
        print(f"cancel at {at:.0f} s ({phase}, {done:,} photos done): stopped {wait:.2f} s later   "
              f"target <= {TARGET_CANCEL:.0f} s: {'met' if wait <= TARGET_CANCEL else 'NOT met'}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
