"""Does ordering groups by the calibrated figures gain yield? (core/calibrated_order.py)

    python -m benchmarks.calibrated_order                                 # fashion, demo, digits
    python -m benchmarks.calibrated_order --datasets fashion --relearn    # relearning every sitting
    python -m benchmarks.calibrated_order --datasets fashion,demo,demo-backdrop --relearn both   # the ablation

The ablation (`--relearn both`): each component of issue 19's order and grouping with and without it, in
one run per data set: relearning, the calibrated order, and (data set `demo-backdrop`: the demo folder's
features with the product's opt-in backdrop correction, core/backdrop_correction.py, against `demo`)
the backdrop correction.

For each data set, in one run: the yield protocol's simulated annotator (benchmarks/yield_sim.py,
no relearning unless --relearn) on a real `core.project.Project` built over the cached
EfficientNet-Lite0 features (benchmarks/cached_project.py, the feature sets of
benchmarks/calibration.py: Fashion-MNIST test 2,000, the demo folder, scikit-learn's digits), once
with the engine's order (`Settings.order = "engine"`) and once with the calibrated one
(`"calibrated"`), and k-means groups in random order on the same features. Prints yield@80 and
yield@100 of each, the ratio calibrated / engine, and the median propose() time.
"""
from __future__ import annotations

import argparse
import json
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.calibration import load, opened  # noqa: E402
from benchmarks.yield_sim import kmeans_baseline, simulate  # noqa: E402
from core.proposals import Settings  # noqa: E402

DATASETS = ("fashion", "demo", "digits")


def run_dataset(name: str, relearn: bool | str = False) -> list[dict]:
    feats, classes = load(name)
    rows = []
    for relearn, order in [(r, o) for r in ((False, True) if relearn == "both" else (bool(relearn),))
                           for o in ("engine", "calibrated")]:
        t0 = time.perf_counter()
        with opened(feats, classes) as (project, truth, _):
            r = simulate(project, truth, relearn=relearn, settings=Settings(order=order),
                         name=f"kinfold, {order} order" + (", relearning" if relearn else ""))
        s = r.summary()
        s["seconds"] = round(time.perf_counter() - t0, 1)
        rows.append(s)
    rows.append(kmeans_baseline(feats, classes).summary())
    return rows


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--datasets", default=",".join(DATASETS))
    ap.add_argument("--relearn", nargs="?", const="on", default="off", choices=("off", "on", "both"),
                    help="relearn every sitting (100 actions); both: with and without, in one run")
    ap.add_argument("--out", default=str(ROOT / "out" / "calibrated_order"))
    args = ap.parse_args(argv)
    print("command: python -m benchmarks.calibrated_order " + " ".join(sys.argv[1:] if argv is None else argv))
    results = {}
    for name in args.datasets.split(","):
        rows = run_dataset(name, {"off": False, "on": True, "both": "both"}[args.relearn])
        results[name] = rows
        print(f"{name} ({rows[0]['photos']} photos)")
        print(f"  {'run':<44} {'yield@80':>8} {'yield@100':>9} {'groups':>6} {'propose median s':>16}")
        for r in rows:
            print(f"  {r['run']:<44} {r['yield80']:>8.3f} {r['yield100']:>9.3f} {r['groups']:>6} "
                  f"{r.get('propose_median_s', ''):>16}")
        for eng, cal in zip(rows[:-1:2], rows[1:-1:2]):
            print(f"  calibrated / engine{' (relearning)' if 'relearning' in eng['run'] else ''}: yield@80 "
                  f"{cal['yield80'] / eng['yield80']:.3f}, yield@100 {cal['yield100'] / eng['yield100']:.3f}", flush=True)
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    (out / {"off": "results.json", "on": "results-relearn.json", "both": "results-ablation.json"}[args.relearn]
     ).write_text(json.dumps(results, indent=1))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
