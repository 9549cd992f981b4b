"""Turning photos into embedding vectors on the CPU.

An *extractor* owns a pretrained network and its input preparation. :func:`embed_files`
decodes photos in a pool of worker threads (Pillow and numpy release the GIL while they
decode, resize and scale pixels) while the calling thread runs the network on the previous
batch, so decoding overlaps inference. Threads rather than processes: nothing to pickle,
no start-method hazards when called from a Qt worker thread, no per-call start-up cost.
"""
from __future__ import annotations

import io
import os
import platform
from collections import deque
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterable, NamedTuple, Protocol, Sequence, runtime_checkable

import numpy as np
import torch
from PIL import Image
from torch import nn

from core import efficientnet_lite
from core.catalogue import result_or_cancel
from core.images import PhotoError, load_rgb

PRECISIONS = ("auto", "bf16", "fp32")
DEFAULT_EXTRACTOR = "efficientnet-lite0"
# EfficientNet-Lite0 by pooling: the same network, its last stage pooled by the global average or by
# the generalised mean, p = 3 (benchmarks/feature_variants.py; README "Pooling of the embedding").
# "efficientnet-lite0" is DEFAULT_POOLING for a new project; a project scanned before keeps the
# pooling its store holds (core/project.py `_kept_pooling`), so it is never re-embedded by surprise.
EFFICIENTNET_LITE0 = {"efficientnet-lite0-avg": "avg", "efficientnet-lite0-gem": "gem"}
DEFAULT_POOLING = "gem"
# The larger member of the family, EfficientNet-Lite2 (260 x 260 input, about twice the network time):
# opt-in, for photos of real objects (README "A larger network"). Its id is its name plus the weights
# and precision, like Lite0's; a project scanned with it keeps it (core/project.py `_kept_pooling`).
EFFICIENTNET_LITE2 = {"efficientnet-lite2-gem": "gem"}
# Torchvision architectures offered; the short names map to torchvision's builder names.
TORCHVISION_MODELS = {
    "resnet18": "resnet18",
    "resnet50": "resnet50",
    "efficientnet_b0": "efficientnet_b0",
    "mobilenet_v3": "mobilenet_v3_large",
    "mobilenet_v3_large": "mobilenet_v3_large",
}
SECOND_VIEW_KEEP = 0.9  # the second view keeps the central 90 % of each side, then mirrors

Progress = Callable[[int, int, str], None]
Cancel = Callable[[], bool]


@runtime_checkable
class Extractor(Protocol):
    """What Kinfold needs of a backbone; any object with these five members can be handed to
    `Project.open(folder, extractor=obj)` (tests/test_custom_extractor.py plugs in a tiny one).

    - ``id``: names the model, its weights and precision, e.g. "efficientnet-lite0:imagenet:bf16";
      embeddings are stored under it, so a different backbone never mixes with another's vectors.
    - ``dim``: the length of each vector ``embed`` returns.
    - ``decode_side``: photos are decoded so that their short side is at least this (JPEGs decode at
      a reduced scale, which is much faster); 0 or None decodes at full size.
    - ``preprocess(img)``: an upright 8-bit RGB PIL image -> a torch tensor; tensors of one batch are
      stacked with ``torch.stack``, so all must have one shape. Called from decoding threads.
    - ``embed(batch)``: the stacked batch -> (B, dim) float32 numpy features, NOT L2-normalised
      (Kinfold normalises). Called from one thread at a time.

    The built-in extractors also have ``input_size`` (the square network input), not required."""
    id: str
    dim: int
    decode_side: int

    def preprocess(self, img: Image.Image) -> torch.Tensor:
        """RGB PIL image -> float tensor (3, input_size, input_size)."""

    def embed(self, batch: torch.Tensor) -> np.ndarray:
        """(B, 3, H, W) -> (B, dim) float32 pooled features, NOT L2-normalised."""


class WeightsMissingError(FileNotFoundError):
    """Pretrained weights are not on disk; Kinfold never downloads them."""


def cpu_has_native_bf16() -> bool:
    """True when the CPU has bfloat16 instructions oneDNN uses (x86 AVX512-BF16 or AMX-BF16,
    Arm BF16). Without them oneDNN emulates bf16, which is slower than fp32."""
    if not torch.backends.mkldnn.is_available():
        return False
    try:
        if not torch.ops.mkldnn._is_mkldnn_bf16_supported():
            return False
    except (AttributeError, RuntimeError):
        return False
    try:
        with open("/proc/cpuinfo", encoding="ascii", errors="replace") as fh:
            flags = set()
            for line in fh:
                if line.startswith(("flags", "Features")):
                    flags.update(line.split(":", 1)[1].split())
    except OSError:
        return platform.system() == "Darwin" and platform.machine() == "arm64"
    return bool(flags & {"avx512_bf16", "amx_bf16", "bf16"})


def resolve_precision(precision: str) -> str:
    if precision not in PRECISIONS:
        raise ValueError(f"precision must be one of {PRECISIONS}, not {precision!r}")
    if precision == "auto":
        return "bf16" if cpu_has_native_bf16() else "fp32"
    return precision


class _TorchExtractor:
    """Shared inference path: channels-last, inference mode, weights cast to bf16 or not.

    bf16 runs as a bf16 model rather than under autocast: on this project's 2-core test
    machine a bf16 model was about 2x faster than autocast (measured, benchmarks/)."""

    def __init__(self, model: nn.Module, precision: str):
        self.precision = resolve_precision(precision)
        self._dtype = torch.bfloat16 if self.precision == "bf16" else torch.float32
        self._model = model.eval().to(dtype=self._dtype, memory_format=torch.channels_last)

    def _pooled(self, x: torch.Tensor) -> torch.Tensor:
        return self._model(x)

    def embed(self, batch: torch.Tensor) -> np.ndarray:
        with torch.inference_mode():
            x = batch.to(dtype=self._dtype).contiguous(memory_format=torch.channels_last)
            return self._pooled(x).float().numpy().astype(np.float32, copy=False)


def efficientnet_lite_id(pooling: str, precision: str, variant: str = "lite0") -> str:
    """The extractor id of EfficientNet-Lite0 (or Lite2) with `pooling`, without loading the network.
    Lite0's average keeps the id it always had, so stores and caches made with it stay valid; every
    other network or pooling is another id, so their vectors never mix."""
    precision = resolve_precision(precision)
    if pooling not in efficientnet_lite.POOLINGS:
        raise ValueError(f"pooling must be one of {efficientnet_lite.POOLINGS}, not {pooling!r}")
    if variant == "lite0" and pooling == "avg":
        return f"efficientnet-lite0:imagenet:{precision}"
    return f"efficientnet-{variant}-{pooling}:imagenet:{precision}"


class EfficientNetLiteExtractor(_TorchExtractor):
    """EfficientNet-Lite0 (or, with ``variant="lite2"``, Lite2) ImageNet weights, 1280-d features of
    the last stage pooled by the global average (``pooling="avg"``) or the generalised mean, p = 3
    (``"gem"``).

    Preprocessing: resize the short side to the network's input side (224; Lite2 260; bilinear,
    antialiased by Pillow) and take the central square, scaled as (x - 127) / 128."""

    dim = efficientnet_lite.FEATURE_DIM

    def __init__(self, precision: str = "auto", pooling: str | None = None, variant: str = "lite0"):
        self.pooling = pooling or DEFAULT_POOLING
        self.id = efficientnet_lite_id(self.pooling, precision, variant)
        # The name that builds this extractor again (a Dask worker is told it).
        names = EFFICIENTNET_LITE0 if variant == "lite0" else EFFICIENTNET_LITE2
        self.name = next(n for n, p in names.items() if p == self.pooling)
        self.input_size = self.decode_side = efficientnet_lite.VARIANTS[variant][2]
        network = efficientnet_lite.fuse_batchnorm(efficientnet_lite.load_efficientnet_lite(variant))
        super().__init__(network, precision)

    def _pooled(self, x: torch.Tensor) -> torch.Tensor:
        return self._model.pooled_features(x, self.pooling)

    def preprocess(self, img: Image.Image) -> torch.Tensor:
        return _to_tensor(
            _centre_square(img, self.input_size),
            efficientnet_lite.INPUT_MEAN,
            efficientnet_lite.INPUT_STD,
        )


def _centre_square(img: Image.Image, size: int) -> Image.Image:
    """Resize-short-side-then-centre-crop in one resampling step."""
    w, h = img.size
    side = min(w, h)
    left, top = (w - side) / 2, (h - side) / 2
    return img.resize((size, size), Image.Resampling.BILINEAR, box=(left, top, left + side, top + side))


def _to_tensor(img: Image.Image, mean, std) -> torch.Tensor:
    # numpy (single-threaded, releases the GIL) rather than torch ops, which would start
    # their own thread team in every decoding thread.
    x = (np.asarray(img, dtype=np.float32) - np.float32(mean)) / np.float32(std)
    return torch.from_numpy(np.ascontiguousarray(x.transpose(2, 0, 1)))


def torchvision_weights_path(arch: str) -> tuple[Path, object]:
    """Where torch hub keeps torchvision's default weights for ``arch``, and the enum."""
    import torchvision

    weights = torchvision.models.get_model_weights(arch).DEFAULT
    filename = os.path.basename(weights.url)
    return Path(torch.hub.get_dir()) / "checkpoints" / filename, weights


class TorchvisionExtractor(_TorchExtractor):
    """A torchvision ImageNet classifier with its classifier removed. Its weights must
    already be in the torch hub checkpoint folder; nothing is downloaded."""

    def __init__(self, name: str, precision: str = "auto"):
        import torchvision

        if name not in TORCHVISION_MODELS:
            raise ValueError(f"unknown model {name!r}; choose from {sorted(TORCHVISION_MODELS)}")
        arch = TORCHVISION_MODELS[name]
        path, weights = torchvision_weights_path(arch)
        if not path.is_file():
            raise WeightsMissingError(
                f"weights for {name} are not on disk: expected {path} "
                f"(file {path.name}; Kinfold never downloads weights, copy the file there)"
            )
        model = torchvision.models.get_model(arch, weights=None)
        model.load_state_dict(torch.load(path, map_location="cpu", weights_only=True))
        self.dim = _drop_classifier(model)
        super().__init__(model, precision)
        self._transform = weights.transforms()
        self.input_size = int(self._transform.crop_size[0])
        self.decode_side = int(self._transform.resize_size[0])
        self.id = f"torchvision-{arch}:{weights.name}:{self.precision}"

    def preprocess(self, img: Image.Image) -> torch.Tensor:
        return self._transform(img)


def _drop_classifier(model: nn.Module) -> int:
    """Replace the classification head by identity; return the pooled feature size."""
    if isinstance(getattr(model, "fc", None), nn.Linear):
        dim = model.fc.in_features
        model.fc = nn.Identity()
        return dim
    head = getattr(model, "classifier", None)
    linears = [m for m in head.modules() if isinstance(m, nn.Linear)] if head is not None else []
    if not linears:
        raise ValueError(f"cannot find the classifier of {type(model).__name__}")
    model.classifier = nn.Identity()
    return linears[0].in_features


def get_extractor(name: str = DEFAULT_EXTRACTOR, precision: str = "auto") -> Extractor:
    if name == DEFAULT_EXTRACTOR:
        return EfficientNetLiteExtractor(precision)
    if name in EFFICIENTNET_LITE0:
        return EfficientNetLiteExtractor(precision, EFFICIENTNET_LITE0[name])
    if name in EFFICIENTNET_LITE2:
        return EfficientNetLiteExtractor(precision, EFFICIENTNET_LITE2[name], "lite2")
    if name in TORCHVISION_MODELS:
        return TorchvisionExtractor(name, precision)
    choices = [DEFAULT_EXTRACTOR, *sorted(EFFICIENTNET_LITE0), *sorted(EFFICIENTNET_LITE2),
               *sorted(TORCHVISION_MODELS)]
    raise ValueError(f"unknown extractor {name!r}; choose from {choices}")


@dataclass
class EmbedResult:
    vectors: np.ndarray  # (m, dim) float32, rows L2-normalised
    ok: list[int] = field(default_factory=list)  # index into paths for each row of vectors
    # (index into paths, reason): not a readable photo as the file stands (damaged, wrong format...)
    failed: list[tuple[int, str]] = field(default_factory=list)
    # (index into paths, reason): a failure that may pass (I/O error, no memory, the network failed)
    retry: list[tuple[int, str]] = field(default_factory=list)
    cancelled: bool = False
    flipped_vectors: np.ndarray | None = None  # second view, same rows as vectors


def l2_normalise(x: np.ndarray) -> np.ndarray:
    norms = np.linalg.norm(x, axis=1, keepdims=True)
    return (x / np.maximum(norms, 1e-12)).astype(np.float32, copy=False)


def embed_images(images: Iterable[Image.Image], extractor: Extractor, batch_size: int = 32) -> np.ndarray:
    """Embed RGB images already in memory: (n, dim) float32, rows L2-normalised."""
    chunks, batch = [], []
    for img in images:
        batch.append(extractor.preprocess(img))
        if len(batch) == batch_size:
            chunks.append(extractor.embed(torch.stack(batch)))
            batch.clear()
    if batch:
        chunks.append(extractor.embed(torch.stack(batch)))
    return l2_normalise(np.concatenate(chunks)) if chunks else np.zeros((0, extractor.dim), np.float32)


def second_view(img: Image.Image) -> Image.Image:
    """Mirror image of the central part: a real second view of the same photo."""
    w, h = img.size
    dx, dy = w * (1 - SECOND_VIEW_KEEP) / 2, h * (1 - SECOND_VIEW_KEEP) / 2
    box = tuple(round(v) for v in (dx, dy, w - dx, h - dy))
    return img.crop(box).transpose(Image.Transpose.FLIP_LEFT_RIGHT)


class _Failed(NamedTuple):
    reason: str
    retry: bool


def _source(item):
    """A path as a Path; an open binary file (or bytes, wrapped) as it is: load_rgb reads either."""
    if isinstance(item, (bytes, bytearray, memoryview)):
        return io.BytesIO(item)
    return item if hasattr(item, "read") else Path(item)


def _prepare(path, extractor: Extractor, flipped: bool):
    """Runs in a worker thread: decoded tensors, or (reason, worth retrying) when the photo failed."""
    try:
        img = load_rgb(path, min_side=extractor.decode_side)
        x = extractor.preprocess(img)
        return x, (extractor.preprocess(second_view(img)) if flipped else None)
    except PhotoError as exc:
        return _Failed(str(exc), exc.retry)
    except MemoryError:
        return _Failed("not enough memory to prepare it", True)
    except Exception as exc:  # a broken photo must never stop the whole run; not judged, so retried
        return _Failed(f"could not be prepared ({type(exc).__name__}: {exc})", True)


def embed_files(
    paths: Sequence[Path],
    extractor: Extractor,
    batch_size: int = 32,
    workers: int | None = None,
    progress: Progress | None = None,
    cancel: Cancel | None = None,
    flipped_view: bool = False,
    counted: tuple[int, int, int] | None = None,
) -> EmbedResult:
    """Embed ``paths`` in order (paths, open binary files or bytes). Photos that cannot be read go to ``failed`` (not a readable photo)
    or ``retry`` (a failure that may pass, including the network failing on a batch); on cancel the
    photos embedded so far are returned with ``cancelled=True``. Safe to call from any thread.

    ``counted``: (embedded, unreadable, total) of a longer run this call is one part of (a scan embeds
    in chunks). Progress then counts, in its figures and its words, across the whole run, and the
    closing words ("done: …") come only from the part that ends it (or is cancelled)."""
    total = len(paths)
    ok0, bad0, run_total = counted or (0, 0, total)

    def report(state: str | None = None) -> None:
        if progress:
            n_ok, n_bad = ok0 + len(ok), bad0 + len(failed) + len(retry)
            progress(n_ok + n_bad, run_total, f"embedded {n_ok} of {run_total} photos" if state is None
                     else f"{state}: {n_ok} embedded, {n_bad} could not be read")

    workers = max(1, workers or os.cpu_count() or 1)
    window = 2 * batch_size + workers  # photos decoded ahead: the next batch overlaps inference
    chunks: list[np.ndarray] = []
    flipped_chunks: list[np.ndarray] = []
    ok: list[int] = []
    failed: list[tuple[int, str]] = []
    retry: list[tuple[int, str]] = []
    cancelled = False
    batch_idx: list[int] = []
    batch: list[torch.Tensor] = []
    batch_flipped: list[torch.Tensor] = []

    def run_batch() -> None:
        try:
            vectors = extractor.embed(torch.stack(batch))
            flipped = extractor.embed(torch.stack(batch_flipped)) if flipped_view else None
        except Exception as exc:  # MemoryError, a runtime error: these photos are tried again next time
            retry.extend((i, f"the network failed on it ({type(exc).__name__}: {exc})") for i in batch_idx)
        else:
            chunks.append(vectors)
            if flipped is not None:
                flipped_chunks.append(flipped)
            ok.extend(batch_idx)
        batch_idx.clear(), batch.clear(), batch_flipped.clear()
        report()

    pool = ThreadPoolExecutor(max_workers=workers, thread_name_prefix="kinfold-decode")
    try:
        pending: deque = deque()
        submitted = 0
        while submitted < total or pending:
            if cancel is not None and cancel():
                cancelled = True
                break
            while submitted < total and len(pending) < window:
                pending.append((submitted, pool.submit(_prepare, _source(paths[submitted]), extractor, flipped_view)))
                submitted += 1
            index, future = pending.popleft()
            prepared = result_or_cancel(future, cancel)
            if prepared is None:
                cancelled = True
                break
            if isinstance(prepared, _Failed):
                reason, again = prepared
                (retry if again else failed).append((index, reason))
            else:
                batch_idx.append(index)
                batch.append(prepared[0])
                if flipped_view:
                    batch_flipped.append(prepared[1])
            if len(batch) == batch_size or (not pending and submitted == total and batch):
                run_batch()
        if cancelled:
            report("cancelled")
        elif ok0 + bad0 + total >= run_total:  # the last part of the run
            report("done")
        else:
            report()
    finally:
        pool.shutdown(wait=True, cancel_futures=True)

    def stacked(parts: list[np.ndarray]) -> np.ndarray:
        return l2_normalise(np.concatenate(parts)) if parts else np.zeros((0, extractor.dim), np.float32)

    return EmbedResult(
        vectors=stacked(chunks),
        ok=ok,
        failed=failed,
        retry=retry,
        cancelled=cancelled,
        flipped_vectors=stacked(flipped_chunks) if flipped_view else None,
    )
