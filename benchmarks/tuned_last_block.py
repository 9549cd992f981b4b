"""Does tuning the backbone's last stage on the confirmed labels pay? (issue 19's "long relearn" question)

EfficientNet-Lite0's last MBConv block and its 1 x 1 head convolution (with the head's batch-norm
scale and shift; statistics frozen) are tuned with cross-entropy on the labelled photos, on top of the
block's cached input (192 x 7 x 7 per photo, float16, computed once), then the product's own label
classifier (`core.relearning.fit_classifier`) is fitted on the tuned, generalised-mean-pooled features.

    python -m benchmarks.tuned_last_block --offline        # random 3,000 labels of Fashion-MNIST test 10,000:
                                                           # classifier accuracy frozen vs tuned
    python -m benchmarks.tuned_last_block --replay         # the yield protocol's annotator, relearning every
                                                           # 100 actions with tuning (1 epoch over at most
                                                           # 4,000 labelled photos, warm-started) and without

Offline prints the accuracy of the most confident 20 / 40 / 60 / 80 / 100 % of the unlabelled photos
and of the 60-80 % band; the replay prints yield@80 / yield@100 for both (run up to 1,000 actions) and
the relearn seconds. A benchmark, not a product path: the product's relearn fits the classifier on
the frozen embedding (README, "Tuning the last stage").
"""
from __future__ import annotations

import argparse
import copy
import json
import shutil
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import torch
import torch.nn.functional as F

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from benchmarks.cached_project import build_project  # noqa: E402
from benchmarks.fashion import CACHE_DIR, CLASS_NAMES, load_fashion_mnist  # noqa: E402
from benchmarks.yield_replay import print_breakdown, where_actions_go  # noqa: E402
from benchmarks.yield_sim import simulate  # noqa: E402
from core import efficientnet_lite as el  # noqa: E402
from core import relearning  # noqa: E402

LAST = 15          # index of the last MBConv block (stage 7: 192 -> 320 channels at 7 x 7)


def block_inputs(n: int, split: str = "t10k") -> tuple[np.ndarray, np.ndarray]:
    """(n, 192, 7, 7) float16 inputs of the last block (bfloat16 network, as a scan runs it) and labels."""
    from PIL import Image
    from core.embedding import _centre_square, _to_tensor

    stem = CACHE_DIR / f"lastblock-input-{split}-n{n}.npy"
    images, labels = load_fashion_mnist(n, split)
    if stem.is_file():
        return np.load(stem), np.asarray(labels)
    model = el.load_efficientnet_lite().eval()
    out = []
    with torch.no_grad(), torch.autocast("cpu", dtype=torch.bfloat16):
        for i in range(0, n, 64):
            x = torch.stack([_to_tensor(_centre_square(Image.fromarray(im, "L").convert("RGB"), el.INPUT_SIZE),
                                        el.INPUT_MEAN, el.INPUT_STD) for im in images[i:i + 64]])
            x = F.relu6(model._bn0(model._conv_stem(x)))
            for block in model._blocks[:LAST]:
                x = block(x)
            out.append(x.float().numpy().astype(np.float16))
    acts = np.concatenate(out)
    stem.parent.mkdir(parents=True, exist_ok=True)
    np.save(stem, acts)
    return acts, np.asarray(labels)


class Tuner:
    """The last block + head of one network, trained warm across calls; `features()` pools them (GeM)."""

    def __init__(self, acts: np.ndarray, seed: int = 0):
        self.acts = acts
        self.model = el.load_efficientnet_lite().eval()          # batch-norm statistics stay frozen
        for p in self.model.parameters():
            p.requires_grad = False
        self.params = [p for m in (self.model._blocks[LAST], self.model._conv_head, self.model._bn1)
                       for p in m.parameters()]
        for p in self.params:
            p.requires_grad = True
        self.opt = torch.optim.AdamW(self.params, lr=3e-4, weight_decay=1e-4)
        self.rng = np.random.default_rng(seed)
        self.lin = None

    def _pooled(self, a: torch.Tensor) -> torch.Tensor:
        m = self.model
        return el.gem(F.relu6(m._bn1(m._conv_head(m._blocks[LAST](a)))))

    def train(self, rows: np.ndarray, y: np.ndarray, classes: int, steps: int, batch: int = 64) -> None:
        if self.lin is None or self.lin[0].shape[0] != classes:
            w = torch.zeros(classes, el.FEATURE_DIM, requires_grad=True)
            b = torch.zeros(classes, requires_grad=True)
            if self.lin is not None:                              # a new label: keep the old rows
                with torch.no_grad():
                    w[:len(self.lin[0])], b[:len(self.lin[1])] = self.lin[0], self.lin[1]
            self.lin = (w, b, torch.optim.AdamW([w, b], lr=1e-2, weight_decay=1e-4))
        w, b, lin_opt = self.lin
        counts = np.bincount(y[rows], minlength=classes).astype(float)
        weight = torch.tensor(len(rows) / (classes * np.maximum(counts, 1)), dtype=torch.float32)   # balanced
        target = torch.from_numpy(y).long()
        for _ in range(steps):
            pick = self.rng.choice(rows, min(batch, len(rows)), replace=False)
            f = self._pooled(torch.from_numpy(self.acts[pick].astype(np.float32)))
            f = F.normalize(f - f.mean(0, keepdim=True).detach(), dim=1)
            loss = F.cross_entropy((f @ w.T + b) * 10.0, target[pick], weight=weight)
            self.opt.zero_grad()
            lin_opt.zero_grad()
            loss.backward()
            self.opt.step()
            lin_opt.step()

    def features(self) -> np.ndarray:
        with torch.no_grad():
            f = np.concatenate([self._pooled(torch.from_numpy(self.acts[i:i + 500].astype(np.float32))).numpy()
                                for i in range(0, len(self.acts), 500)])
        return f / np.linalg.norm(f, axis=1, keepdims=True)


def offline(n: int, labelled: int, epochs: int) -> None:
    acts, y = block_inputs(n)
    rng = np.random.default_rng(0)
    lab = rng.choice(n, labelled, replace=False)
    rest = np.setdiff1d(np.arange(n), lab)
    state = np.zeros(n, np.int64)
    state[lab] = relearning.LABELLED
    names = list(CLASS_NAMES)
    label_of = np.where(state == relearning.LABELLED, y, -1)

    def report(tag: str, feats: np.ndarray) -> None:
        clf = relearning.fit_classifier(feats, state, label_of, names)
        p = clf.probabilities(feats[rest], names)
        conf, ok = p.max(1), p.argmax(1) == y[rest]
        o = np.argsort(-conf)
        accs = [ok[o[:int(len(o) * q)]].mean() for q in (0.2, 0.4, 0.6, 0.8, 1.0)]
        band = ok[o[int(0.6 * len(o)):int(0.8 * len(o))]].mean()
        print(f"  {tag:<34} " + " ".join(f"{a:.3f}" for a in accs) + f"   band 60-80 %: {band:.3f}", flush=True)

    print(f"Fashion-MNIST test {n}, {labelled} random labels; accuracy of the most confident 20/40/60/80/100 %")
    tuner = Tuner(acts)
    report("frozen (GeM, as scanned)", tuner.features())
    t0 = time.perf_counter()
    tuner.train(lab, y, len(names), steps=epochs * labelled // 64)
    report(f"last block tuned, {epochs} epochs ({time.perf_counter() - t0:.0f} s)", tuner.features())


def replay(n: int, epochs: float, most: int, max_actions: int) -> None:
    acts, y = block_inputs(n)
    classes = [CLASS_NAMES[int(c)] for c in y]
    for tune in (False, True):
        tuner = Tuner(acts)
        frozen = tuner.features()
        work = Path(tempfile.mkdtemp(prefix="kinfold-tuned-"))
        try:
            project, truth = build_project(work, frozen, classes, annotator="simulated")
            held = {}

            def label_classifier(names, held=held):
                # The relearned classifier's probabilities on the (tuned) features, per label list.
                if "clf" not in held:
                    return None
                key = tuple(names)
                if held.get("key") != key:
                    held["key"], held["prob"] = key, held["clf"].probabilities(held["features"], list(names))
                return held["prob"]

            project.label_classifier = label_classifier            # what propose and split read
            spent = []

            class Tuned:
                def __getattr__(self, name):
                    return getattr(project, name)

                def relearn(self, seconds=None):
                    t0 = time.perf_counter()
                    state, label_of, names = project.label_arrays()
                    rows = np.flatnonzero(state == relearning.LABELLED)
                    if len(np.unique(label_of[rows])) < 2:
                        return {}
                    feats = frozen
                    if tune:
                        tuner.train(rows, label_of, len(names), steps=int(epochs * min(len(rows), most) / 64) + 1)
                        feats = tuner.features()
                    held.update(clf=relearning.fit_classifier(feats, state, label_of, names,
                                                              not_label=project.label_state.not_label()),
                                features=feats, key=None)
                    spent.append(round(time.perf_counter() - t0, 1))
                    return {}

            with project:
                name = f"tuned last block, {epochs} epoch over <= {most}" if tune else "frozen (same path, no tuning)"
                run = simulate(Tuned(), truth, sitting=100, relearn=True, name=name, max_actions=max_actions)
        finally:
            shutil.rmtree(work, ignore_errors=True)
        print(json.dumps(run.summary() | dict(relearn_s=spent)), flush=True)
        print_breakdown(where_actions_go(run))


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--offline", action="store_true")
    ap.add_argument("--replay", action="store_true")
    ap.add_argument("--n", type=int, default=10000)
    ap.add_argument("--labelled", type=int, default=3000, help="offline: random labelled photos")
    ap.add_argument("--epochs", type=float, default=1.0, help="replay: epochs per relearn (offline: 5)")
    ap.add_argument("--most", type=int, default=4000, help="replay: at most this many labelled photos per epoch")
    ap.add_argument("--max-actions", type=int, default=1000)
    ap.add_argument("--threads", type=int, default=2)
    args = ap.parse_args(argv)
    print("command: python -m benchmarks.tuned_last_block " + " ".join(sys.argv[1:] if argv is None else argv))
    torch.set_num_threads(args.threads)
    torch.manual_seed(0)
    if args.offline or not args.replay:
        offline(args.n, args.labelled, epochs=5)
    if args.replay:
        replay(args.n, args.epochs, args.most, args.max_actions)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
