"""How honest the trust figure is: the trust-calibration measurement of docs' yield protocol.

    python -m benchmarks.calibration                          # fashion, fashion-train, digits, demo
    python -m benchmarks.calibration --datasets fashion,demo
    python -m benchmarks.calibration --fit-prior              # refit the prior on Fashion-MNIST train + digits

For each data set, with the simulated annotator of the yield protocol who knows the true classes:
* cold: a fresh project, the first 50 groups the engine proposes;
* warm: then up to 15 groups accepted as the annotator would (stopping once half the photos carry a
  label), a relearn, and the next 50 groups.
For each set of groups it prints the photo-weighted mean |trust - purity| of the raw engine figure and
of the calibrated one (core.calibration), the same for the suggested label's confidence against the
share of members that carry it, and the reliability table (trust bins x observed photo-weighted purity,
groups and photos per bin). A reliability plot goes to --out (default out/calibration/reliability.png).

Data sets: Fashion-MNIST test 2,000 (`fashion`, held out), Fashion-MNIST train first 2,000
(`fashion-train`, the prior is fitted on it and on digits), scikit-learn's digits rendered as 32 x 32 grey photos (`digits`), and the
demo folder (`demo`, scanned once into a store under ~/.cache/kinfold-bench/calibration/). All use
EfficientNet-Lite0 ImageNet features, replayed through a real `core.project.Project` built over them
(benchmarks/cached_project.py): the calibrated figures are what `Project.propose` returns, the raw ones
the engine's figures its store keeps in the proposal rows.
"""
from __future__ import annotations

import argparse
import json
import sys
import shutil
import tempfile
import time
from contextlib import contextmanager
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.fashion import CACHE_DIR, CLASS_NAMES, fashion_features  # noqa: E402
from benchmarks.cached_project import build_project  # noqa: E402
from benchmarks.yield_sim import majority  # noqa: E402
from core import calibration  # noqa: E402
from core.project import Project  # noqa: E402


WORK = CACHE_DIR / "calibration"
DATASETS = ("fashion", "fashion-train", "digits", "demo", "demo-backdrop")


def load(name: str) -> tuple[np.ndarray, list[str]]:
    """(features, true class per photo) of a data set."""
    if name == "fashion":
        f, y = fashion_features(2000)
        return f, [CLASS_NAMES[int(c)] for c in y]
    if name == "fashion-train":
        f, y = fashion_features(2000, split="train")
        return f, [CLASS_NAMES[int(c)] for c in y]
    WORK.mkdir(parents=True, exist_ok=True)
    from core.embedding import DEFAULT_POOLING

    # the default extractor's features: its pooling in the names (the average's caches kept theirs)
    tag = "" if DEFAULT_POOLING == "avg" else f"-{DEFAULT_POOLING}"
    cache_f, cache_y = WORK / f"{name}{tag}-features.npy", WORK / f"{name}{tag}-classes.json"
    if cache_f.is_file() and cache_y.is_file():
        return np.load(cache_f), json.loads(cache_y.read_text())
    if name == "digits":
        from PIL import Image
        from sklearn.datasets import load_digits

        from core.embedding import embed_images, get_extractor

        d = load_digits()
        imgs = (Image.fromarray((im * 255 / 16).astype(np.uint8), "L").resize((32, 32), Image.BILINEAR)
                .convert("RGB") for im in d.images)
        feats = embed_images(imgs, get_extractor())
        classes = [str(int(c)) for c in d.target]
    elif name in ("demo", "demo-backdrop"):
        from app.demo import load_demo_truth

        truth = load_demo_truth(ROOT / "resources" / "demo_truth.csv")
        p = Project.open(ROOT / "sample_images", store=WORK / f"demo-store{tag}", annotator="simulated")
        try:
            p.scan()
            keep = [i for i, q in enumerate(p.photos()) if truth.get(q) not in (None, "broken")]
            if name == "demo-backdrop":       # the product's own opt-in correction (core/backdrop_correction.py)
                p.backdrop_correction(4)
                feats = p.features()[keep]
                p.backdrop_correction(None)
            else:
                feats = p.backbone_features()[keep]
            classes = [truth[p.photos()[i]] for i in keep]
        finally:
            p.close()
    else:
        raise SystemExit(f"unknown data set {name}; choose from {', '.join(DATASETS)}")
    np.save(cache_f, feats)
    cache_y.write_text(json.dumps(classes))
    return feats, classes


@contextmanager
def opened(feats: np.ndarray, classes: list[str]):
    """A real `core.project.Project` over `feats` (benchmarks/cached_project.py, in a temporary folder
    removed afterwards); yields (project, truth {path: class}, {path: row of the graph})."""
    work = Path(tempfile.mkdtemp(prefix="kinfold-calibration-"))
    try:
        project, truth = build_project(work, feats, classes, annotator="simulated")
        with project:
            yield project, truth, {p: i for i, p in enumerate(project.photos())}
    finally:
        shutil.rmtree(work, ignore_errors=True)


def _measure(project: Project, groups, truth: dict[str, str]) -> dict:
    """Calibrated figures (what `Project.propose` returns) and the engine's raw ones (kept in the
    store's proposal rows) of `groups` against the truth."""
    rows = []
    for g in groups:
        raw = project.store.proposal(g.id)
        cls = [truth[m] for m in g.members]
        share = None if g.suggested_label is None else float(np.mean([x == g.suggested_label for x in cls]))
        rows.append(dict(size=len(cls), purity=calibration.purity(cls), raw=raw.trust, trust=g.trust,
                         raw_conf=raw.confidence, conf=g.confidence, share=share, kind=g.kind))
    return _summary(rows)


def _summary(rows: list[dict]) -> dict:
    size = [r["size"] for r in rows]
    pur = [r["purity"] for r in rows]
    out = dict(groups=len(rows), photos=int(sum(size)), rows=rows,
               raw_error=calibration.calibration_error([r["raw"] for r in rows], pur, size),
               error=calibration.calibration_error([r["trust"] for r in rows], pur, size),
               table=calibration.reliability_table([r["trust"] for r in rows], pur, size))
    out["bin_gap"] = calibration.bin_gap(out["table"])
    out["floor"] = calibration.calibration_error([float(np.median(pur))] * len(pur), pur, size)
    out["sampling_floor"] = calibration.sampling_floor(pur, size)
    lab = [r for r in rows if r["share"] is not None]
    if lab:
        s = [r["size"] for r in lab]
        sh = [r["share"] for r in lab]
        out["label_groups"] = len(lab)
        out["raw_conf_error"] = calibration.calibration_error([r["raw_conf"] for r in lab], sh, s)
        out["conf_error"] = calibration.calibration_error([r["conf"] for r in lab], sh, s)
    return out


def _accept_as_annotator(project: Project, g, truth: dict[str, str]) -> int:
    """The yield protocol's annotator: accept under the majority class, taking the others out.
    Returns the photos labelled."""
    cls = [truth[m] for m in g.members]
    m = majority(cls)
    drop = [p for p, c in zip(g.members, cls) if c != m]
    project.accept(g.id, m, drop=drop)
    return len(cls) - len(drop)


def run(feats: np.ndarray, classes: list[str], warm_groups: int = 15, limit: int = 50,
        relearn: bool = True) -> dict:
    """Cold and warm measurement on one data set, through a real Project: its calibration learns
    from the groups accepted (Project.calibration reads them from the decision log)."""
    with opened(feats, classes) as (project, truth, _):
        # hold=0: looking at the first groups does not keep them open (the warm phase forms its own).
        cold = _measure(project, project.propose(limit=limit, hold=0), truth)
        n, labelled = len(classes), 0
        for _ in range(warm_groups):
            if labelled >= n / 2:
                break
            gs = project.propose(limit=1, hold=1)
            if not gs:
                break
            labelled += _accept_as_annotator(project, gs[0], truth)
        if relearn:
            project.relearn()
        warm = _measure(project, project.propose(limit=limit, hold=0), truth)
        warm["accepted_before"] = len(project.calibration().seen_trust)
    return dict(cold=cold, warm=warm)


def print_result(name: str, res: dict) -> None:
    for phase in ("cold", "warm"):
        r = res[phase]
        extra = f", after {r['accepted_before']} accepted groups and a relearn" if phase == "warm" else ""
        print(f"{name} {phase}{extra}: {r['groups']} groups, {r['photos']} photos")
        print(f"  photo-weighted |trust - purity|: calibrated {r['error']:.3f} (goal <= 0.05), "
              f"raw engine figure {r['raw_error']:.3f}")
        print(f"  per-bin gap (photo-weighted |bin trust - bin purity|): {r['bin_gap']:.3f}; "
              f"one figure for every group (the median purity) would score {r['floor']:.3f}")
        print(f"  sampling floor (each group's exact expected purity would still miss by, binomial): "
              f"{r['sampling_floor']:.3f}")
        if "label_groups" in r:
            print(f"  suggested label, |confidence - share carrying it| over {r['label_groups']} groups: "
                  f"calibrated {r['conf_error']:.3f}, raw {r['raw_conf_error']:.3f}")
        print(f"  {'trust bin':<11} {'groups':>6} {'photos':>6} {'trust':>6} {'purity':>6}")
        for b in r["table"]:
            t = "" if b["trust"] is None else f"{b['trust']:.3f}"
            p = "" if b["purity"] is None else f"{b['purity']:.3f}"
            print(f"  {b['bin']:<11} {b['groups']:>6} {b['photos']:>6} {t:>6} {p:>6}")


def plot(results: dict, path: Path) -> None:
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(1, 2, figsize=(9, 4.3), sharey=True)
    for ax, phase in zip(axes, ("cold", "warm")):
        ax.plot([0, 1], [0, 1], color="#999", lw=1, ls="--", label="trust = purity")
        for name, res in results.items():
            r = res[phase]["rows"]
            t = np.array([x["trust"] for x in r])
            p = np.array([x["purity"] for x in r])
            w = np.array([x["size"] for x in r], float)
            ax.scatter(t, p, s=6 + 2 * np.sqrt(w) * 3, alpha=0.45,
                       label=f"{name} (error {res[phase]['error']:.3f})")
        ax.set_title("before any label" if phase == "cold" else "after labels and a relearn")
        ax.set_xlabel("calibrated trust")
        ax.set_xlim(0.3, 1.02)
        ax.set_ylim(0.3, 1.02)
        ax.grid(alpha=0.3)
        ax.legend(fontsize=7, loc="lower right")
    axes[0].set_ylabel("observed purity (true classes)")
    fig.suptitle("Kinfold trust against purity, first 50 groups (dot area ~ group size)", fontsize=10)
    fig.tight_layout()
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=100)
    plt.close(fig)


def fit_prior(stages=(0, 15), limit: int = 50, datasets=("fashion-train", "digits")) -> None:
    """Fit PRIOR_TRUST / PRIOR_LABEL on `datasets` (default Fashion-MNIST train 2,000 and scikit-learn
    digits, so Fashion-MNIST test 2,000 and the demo stay held out): on each, the first `limit` groups
    proposed cold and after each number of accepted groups in `stages` (each followed by a relearn)."""
    rows = []
    for name in datasets:
        feats, classes = load(name)
        with opened(feats, classes) as (project, truth, row_of):
            done = 0
            for stage in stages:
                while done < stage:
                    gs = project.propose(limit=1, hold=1)
                    if not gs:
                        break
                    _accept_as_annotator(project, gs[0], truth)
                    done += 1
                if stage:
                    project.relearn()
                graph = project.graph()
                ranks = calibration.entropy_ranks(graph)
                for g in project.propose(limit=limit, hold=0):
                    cls = [truth[m] for m in g.members]
                    if len(cls) < 2:
                        continue
                    raw = project.store.proposal(g.id)       # the prior is fitted on the engine's own figures
                    sug = raw.suggested_label is not None
                    f = calibration.group_features(graph, [row_of[m] for m in g.members], sug, raw.confidence, ranks)
                    share = float(np.mean([c == raw.suggested_label for c in cls])) if sug else None
                    rows.append((f, calibration.purity(cls), share, len(cls)))
        print(f"{name}: {len(rows)} groups so far", flush=True)
    x = np.array([r[0] for r in rows])
    mean, scale = x.mean(0), np.maximum(x.std(0), 1e-3)
    calibration.MEAN[:], calibration.SCALE[:] = [round(float(v), 4) for v in mean], [round(float(v), 4) for v in scale]
    size = np.array([r[3] for r in rows], float)
    trust = calibration.fit_prior(x, np.array([r[1] for r in rows]), size)
    lab = [r for r in rows if r[2] is not None]
    label = calibration.fit_prior(np.array([r[0] for r in lab]), np.array([r[2] for r in lab]),
                                  np.array([r[3] for r in lab], float))
    print(f"{len(rows)} groups ({len(lab)} with a suggestion) from {', '.join(datasets)}; paste into core/calibration.py:")
    print(f"PRIOR_TRUST = {trust}")
    print(f"PRIOR_LABEL = {label}")
    print(f"MEAN = {calibration.MEAN}")
    print(f"SCALE = {calibration.SCALE}")


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--datasets", default=",".join(DATASETS))
    ap.add_argument("--fit-prior", action="store_true")
    ap.add_argument("--fit-stages", default="0,15", help="accepted groups before each set of groups fitted on")
    ap.add_argument("--fit-limit", type=int, default=50, help="groups fitted on at each stage")
    ap.add_argument("--fit-datasets", default="fashion-train,digits", help="data sets the prior is fitted on")
    ap.add_argument("--out", default=str(ROOT / "out" / "calibration"))
    ap.add_argument("--plot", default=None, help="also write the reliability plot here (e.g. a screenshot path)")
    args = ap.parse_args(argv)
    print("command: python -m benchmarks.calibration " + " ".join(sys.argv[1:] if argv is None else argv))
    if args.fit_prior:
        fit_prior(tuple(int(v) for v in args.fit_stages.split(",")), args.fit_limit,
                  tuple(args.fit_datasets.split(",")))
        return 0
    results = {}
    for name in args.datasets.split(","):
        t0 = time.perf_counter()
        feats, classes = load(name)
        results[name] = run(feats, classes)
        print_result(name, results[name])
        print(f"  ({time.perf_counter() - t0:.1f} s)", flush=True)
    print("summary (photo-weighted |trust - purity|, goal <= 0.05): " + "; ".join(
        f"{k} cold {v['cold']['error']:.3f} warm {v['warm']['error']:.3f}" for k, v in results.items()))
    out = Path(args.out)
    plot(results, out / "reliability.png")
    if args.plot:
        plot(results, Path(args.plot))
    (out / "calibration.json").write_text(json.dumps(
        {k: {ph: {x: y for x, y in v[ph].items() if x != "rows"} for ph in v} for k, v in results.items()}, indent=1))
    print(f"plot: {out / 'reliability.png'}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
