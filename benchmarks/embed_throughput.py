"""Embedding throughput on full-size photos: is decoding hidden behind inference?

    python -m benchmarks.embed_throughput                       # 500 generated 12-MP JPEGs
    python -m benchmarks.embed_throughput --count 100
    python -m benchmarks.embed_throughput --folder sample_images

Measured in one run:
  model   wall time per photo of the network alone, all cores, tensors already in memory
  decode  CPU time per photo of one worker's job, single thread: load_rgb(min_side) (JPEG
          draft mode) plus the extractor's preprocessing; load_rgb alone is printed too
  limit   photos/s with c cores if decoding were perfectly spread and overlapped:
          1 / (model + decode / c)
  end-to-end  embed_files() photos/s on the same photos; target ratio end-to-end / limit >= 0.8
The generated photos (4000 x 3000, quality 90, scikit-image samples upscaled with noise) are
cached in ~/.cache/kinfold-bench/jpeg-12mp/.
"""
from __future__ import annotations

import argparse
import os
import sys
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from core.atomic import write_with  # noqa: E402
from core.embedding import embed_files, get_extractor  # noqa: E402
from core.images import IMAGE_SUFFIXES, load_rgb  # noqa: E402

CACHE = Path.home() / ".cache" / "kinfold-bench" / "jpeg-12mp"
SIZE = (4000, 3000)
SOURCES = ["astronaut", "chelsea", "coffee", "rocket", "immunohistochemistry",
           "hubble_deep_field", "retina", "colorwheel", "motorcycle"]


def _source(name: str) -> np.ndarray:
    from skimage import data

    img = data.stereo_motorcycle()[0] if name == "motorcycle" else getattr(data, name)()
    return img[..., :3]


def _make_photo(i: int) -> str:
    from PIL import Image

    path = CACHE / f"photo_{i:04d}.jpg"
    if path.exists():
        return str(path)
    rng = np.random.default_rng(i)
    base = Image.fromarray(_source(SOURCES[i % len(SOURCES)]))
    # Upscale a random 4:3 window so photos differ; add sensor-like noise so the JPEG
    # carries about as much entropy as a real photo.
    w, h = base.size
    cw = min(w, h * 4 // 3)
    ch = cw * 3 // 4
    x0, y0 = rng.integers(0, w - cw + 1), rng.integers(0, h - ch + 1)
    big = base.resize(SIZE, Image.Resampling.BICUBIC, box=(x0, y0, x0 + cw, y0 + ch))
    pixels = np.asarray(big, dtype=np.int16) + rng.normal(0, 4, (SIZE[1], SIZE[0], 3)).astype(np.int16)
    write_with(path, lambda tmp: Image.fromarray(np.clip(pixels, 0, 255).astype(np.uint8)).save(tmp, "JPEG",
                                                                                                  quality=90))
    return str(path)


def generated_photos(count: int) -> list[Path]:
    CACHE.mkdir(parents=True, exist_ok=True)
    missing = [i for i in range(count) if not (CACHE / f"photo_{i:04d}.jpg").exists()]
    if missing:
        print(f"generating {len(missing)} photos of {SIZE[0]}x{SIZE[1]} in {CACHE} (once) ...", flush=True)
        with ProcessPoolExecutor(os.cpu_count()) as pool:
            list(pool.map(_make_photo, missing, chunksize=4))
    return [CACHE / f"photo_{i:04d}.jpg" for i in range(count)]


def folder_photos(folder: Path, count: int) -> list[Path]:
    paths = sorted(p for p in Path(folder).rglob("*") if p.suffix.lower() in IMAGE_SUFFIXES)
    return paths[:count]


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--count", type=int, default=500)
    ap.add_argument("--folder", type=Path, help="measure on this folder's photos instead")
    ap.add_argument("--extractor", default="efficientnet-lite0")
    ap.add_argument("--precision", default="auto")
    ap.add_argument("--batch-size", type=int, default=32)
    ap.add_argument("--workers", type=int, default=None)
    args = ap.parse_args(argv)
    print("command: python -m benchmarks.embed_throughput " + " ".join(sys.argv[1:] if argv is None else argv))

    paths = folder_photos(args.folder, args.count) if args.folder else generated_photos(args.count)
    if not paths:
        raise SystemExit("no photos found")
    extractor = get_extractor(args.extractor, args.precision)
    cores = os.cpu_count() or 1
    import torch

    print(f"{len(paths)} photos, extractor {extractor.id}, {cores} cores, torch threads {torch.get_num_threads()}")

    # decode: one worker's job, single thread, CPU time
    load_cpu, prep_cpu, failed = [], [], 0
    tensors = []
    for path in paths:
        t0 = time.process_time()
        try:
            img = load_rgb(path, min_side=extractor.decode_side)
        except Exception:
            failed += 1
            continue
        t1 = time.process_time()
        x = extractor.preprocess(img)
        t2 = time.process_time()
        load_cpu.append(t1 - t0)
        prep_cpu.append(t2 - t1)
        if len(tensors) < 2 * args.batch_size:
            tensors.append(x)
    load_s = float(np.mean(load_cpu))
    decode_s = load_s + float(np.mean(prep_cpu))

    # model: whole batches from memory, after one warm-up batch
    batches = [torch.stack(tensors[i:i + args.batch_size]) for i in range(0, len(tensors), args.batch_size)]
    extractor.embed(batches[0])
    done, t0 = 0, time.perf_counter()
    while done < max(256, len(tensors)):
        for b in batches:
            extractor.embed(b)
            done += len(b)
    model_s = (time.perf_counter() - t0) / done

    limit = 1.0 / (model_s + decode_s / cores)
    # end-to-end
    t0 = time.perf_counter()
    result = embed_files(paths, extractor, batch_size=args.batch_size, workers=args.workers)
    e2e_s = time.perf_counter() - t0
    e2e = len(paths) / e2e_s

    print(f"model only      {model_s * 1000:7.2f} ms/photo wall ({1 / model_s:6.1f} photos/s, {cores} cores)")
    print(f"decode only     {decode_s * 1000:7.2f} ms/photo CPU (load_rgb {load_s * 1000:.2f} + preprocess "
          f"{(decode_s - load_s) * 1000:.2f}; {failed} unreadable)")
    print(f"limit           {limit:7.1f} photos/s = 1 / (model + decode / {cores})"
          f"   [load_rgb only: {1 / (model_s + load_s / cores):.1f}]")
    print(f"end-to-end      {e2e:7.1f} photos/s ({e2e_s:.1f} s for {len(paths)}, "
          f"{len(result.ok)} embedded, {len(result.failed)} failed)")
    print(f"ratio end-to-end / limit = {e2e / limit:.2f}  (target >= 0.8)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
