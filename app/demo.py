"""The demo folder: photos of a community repair workshop's spare-parts drawers (an invented scenario).

Everything is drawn with Pillow and numpy from one seed, so a seed always gives the same bytes on the
same Pillow build. The folder holds part photos (pose, scale, position, lighting, drawer-liner
background, clutter, blur and noise all vary), a few near-duplicate bursts with consecutive names,
a few odd ones out, one truncated JPEG, one stray text file, a mix of .jpg/.png/.webp, photos stored
rotated with an EXIF orientation tag, and subfolders whose names say nothing about the contents.

Truth classes: the names in PART_CLASSES, ODD (not a part: an empty drawer, a coffee mug, a note
card), BROKEN (the truncated JPEG) and NON_IMAGE (the stray text file).

    python -m app.demo --out sample_images --truth resources/demo_truth.csv --seed 7
"""
from __future__ import annotations

import argparse
import csv
import io
import math
import os
import sys
from pathlib import Path
from typing import Callable

import numpy as np
from PIL import Image, ImageDraw, ImageFilter

from core.atomic import write_bytes

PART_CLASSES = ("hex_nut", "washer", "wood_screw", "coil_spring", "spur_gear",
                "cartridge_fuse", "resistor", "aa_battery", "led", "key_blank")
ODD, BROKEN, NON_IMAGE = "odd", "broken", "non_image"
DEFAULT_COUNT = 340           # part photos; the odd ones, the broken file and the text file come on top
_ODD_KINDS = ("empty", "mug", "note", "empty", "mug")
_SIZES = ((320, 240), (360, 270), (400, 300), (448, 336), (480, 360))
_SIZE_WEIGHTS = (0.32, 0.26, 0.2, 0.12, 0.1)      # mostly small: the committed set must stay a few MB
# Folders by position in the shooting order: (share of the photos, folder); names reveal nothing.
_FOLDERS = ((0.12, ""), (0.33, "drawer-a"), (0.35, "drawer-b"), (0.20, "drawer-b/lower-tray"))
_EXIF_ORIENTATION = 0x0112

Rng = np.random.Generator
RGB = tuple[int, int, int]


# ---------------------------------------------------------------- small drawing helpers

def _tone(rgb: RGB, f: float = 1.0, alpha: int = 255) -> tuple[int, int, int, int]:
    return tuple(int(min(255, max(0, round(c * f)))) for c in rgb) + (alpha,)


def _jitter(rng: Rng, rgb: RGB, amount: int = 10) -> RGB:
    return tuple(int(min(255, max(0, c + rng.integers(-amount, amount + 1)))) for c in rgb)


def _pick(rng: Rng, options: dict):
    keys = list(options)
    p = np.array([options[k] for k in keys], dtype=float)
    return keys[rng.choice(len(keys), p=p / p.sum())]


def _circle(cx: float, cy: float, r: float) -> tuple[float, float, float, float]:
    return (cx - r, cy - r, cx + r, cy + r)


def _canvas(w: int, h: int) -> tuple[Image.Image, ImageDraw.ImageDraw]:
    im = Image.new("RGBA", (int(w), int(h)), (0, 0, 0, 0))
    return im, ImageDraw.Draw(im)   # plain mode: a transparent fill punches a hole


def _gain(layer: Image.Image, gain: np.ndarray) -> Image.Image:
    a = np.asarray(layer).astype(np.float32)
    a[..., :3] *= gain[..., None]
    return Image.fromarray(np.clip(a, 0, 255).astype(np.uint8))


def _linear_gain(w: int, h: int, angle: float, lo: float, hi: float) -> np.ndarray:
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    t = (xx - w / 2) * math.cos(angle) + (yy - h / 2) * math.sin(angle)
    t = (t - t.min()) / max(1e-6, float(t.max() - t.min()))
    return lo + (hi - lo) * t


def _cylinder_gain(w: int, h: int, centre: float, radius: float, along_x: bool = True) -> np.ndarray:
    """Brightness across a lit cylinder: dark rims, a highlight a third of the way in."""
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    s = np.clip(((yy if along_x else xx) - centre) / radius, -1, 1)
    return 0.55 + 0.5 * np.sqrt(1 - s * s) + 0.45 * np.exp(-((s + 0.4) / 0.16) ** 2)


def _conical_gain(w: int, h: int, phase: float) -> np.ndarray:
    """Turned metal seen from above: bright and dark sectors around the centre."""
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    theta = np.arctan2(yy - h / 2, xx - w / 2)
    return 0.82 + 0.3 * np.cos(2 * (theta - phase))


def _smooth(rng: Rng, w: int, h: int, cells_x: int, cells_y: int) -> np.ndarray:
    """Smooth random field in about [0, 1]: a small random grid enlarged bicubically."""
    small = rng.random((max(2, cells_y), max(2, cells_x))).astype(np.float32)
    return np.asarray(Image.fromarray(small).resize((w, h), Image.Resampling.BICUBIC))


_METALS = {"steel": (176, 179, 184), "yellow_zinc": (206, 180, 104), "brass": (201, 162, 78),
           "black": (64, 62, 62), "copper": (190, 112, 72), "nickel": (204, 204, 208)}


def _metal(rng: Rng, weights: dict) -> RGB:
    return _jitter(rng, _METALS[_pick(rng, weights)], 8)


# ---------------------------------------------------------------- the parts (drawn large, in local units)

def _hex_nut(rng: Rng) -> Image.Image:
    s, R = 320, 150
    c = s / 2
    col = _metal(rng, {"steel": 5, "yellow_zinc": 2, "black": 1.5, "brass": 1.5})
    im, d = _canvas(s, s)
    hexagon = [(c + R * math.cos(k * math.pi / 3), c + R * math.sin(k * math.pi / 3)) for k in range(6)]
    d.polygon(hexagon, fill=_tone(col, 0.78))
    inner = R * math.cos(math.pi / 6)
    d.ellipse(_circle(c, c, inner * rng.uniform(0.93, 0.99)), fill=_tone(col))       # chamfered face
    hole = inner * rng.uniform(0.42, 0.58)
    d.ellipse(_circle(c, c, hole * 1.25), fill=_tone(col, 0.62))                    # countersink
    if rng.random() < 0.25:                                                           # nylon lock ring
        d.ellipse(_circle(c, c, hole * 1.12), fill=_tone(_jitter(rng, (225, 225, 215)) if rng.random() < 0.6
                                                          else (60, 90, 200)))
    for k in range(3):
        d.ellipse(_circle(c, c, hole * (1.03 + 0.06 * k)), outline=_tone(col, 0.45), width=3)
    d.ellipse(_circle(c, c, hole), fill=(0, 0, 0, 0))
    d.polygon(hexagon, outline=_tone(col, 0.5), width=4)
    return _gain(im, _linear_gain(s, s, rng.uniform(0, 2 * math.pi), 0.72, 1.22))


def _washer(rng: Rng) -> Image.Image:
    s, R = 320, 150
    c = s / 2
    col = _metal(rng, {"steel": 5, "yellow_zinc": 1, "brass": 1, "copper": 1})
    if rng.random() < 0.15:
        col = _jitter(rng, (232, 230, 222))                                           # nylon washer
    im, d = _canvas(s, s)
    split = rng.random() < 0.2
    hole = R * (rng.uniform(0.55, 0.66) if split else rng.uniform(0.36, 0.56))
    d.ellipse(_circle(c, c, R), fill=_tone(col))
    d.ellipse(_circle(c, c, R), outline=_tone(col, 0.6), width=3)
    d.ellipse(_circle(c, c, hole + 3), fill=_tone(col, 0.6))
    d.ellipse(_circle(c, c, hole), fill=(0, 0, 0, 0))
    if split:                                                                         # spring washer gap
        a = rng.uniform(0, 2 * math.pi)
        gap = [(c + r * math.cos(a + da), c + r * math.sin(a + da)) for r, da in
               ((hole - 4, -0.05), (R + 4, -0.05), (R + 4, 0.05), (hole - 4, 0.05))]
        d.polygon(gap, fill=(0, 0, 0, 0))
    gain = _conical_gain(s, s, rng.uniform(0, math.pi)) * _linear_gain(s, s, rng.uniform(0, 6.3), 0.85, 1.15)
    return _gain(im, gain)


def _wood_screw(rng: Rng) -> Image.Image:
    w, h = 480, 140
    cy = h / 2
    col = _metal(rng, {"yellow_zinc": 4, "steel": 3.5, "black": 1.5, "brass": 1})
    im, d = _canvas(w, h)
    x0, head_len = 18, rng.uniform(28, 38)
    head_r, shank_r = rng.uniform(40, 48), rng.uniform(13, 16)
    crest = shank_r + rng.uniform(7, 10)
    x_head = x0 + head_len
    thread_start = x_head + rng.uniform(20, 140)
    tip = w - 14
    taper_start = tip - rng.uniform(50, 75)
    pitch = rng.uniform(17, 25)

    def taper(x: float) -> float:
        return 1.0 if x < taper_start else max(0.0, (tip - x) / (tip - taper_start))

    d.polygon([(x0, cy - head_r), (x0 + 5, cy - head_r), (x_head, cy - shank_r), (x_head, cy + shank_r),
               (x0 + 5, cy + head_r), (x0, cy + head_r)], fill=_tone(col))
    top, bottom = [(x_head - 1, cy - shank_r), (thread_start, cy - shank_r)], []
    crests = []
    x, k = thread_start, 0
    while x < tip:
        r = (crest if k % 2 else shank_r) * taper(x)
        top.append((x, cy - r))
        bottom.append((x + pitch / 4, cy + ((shank_r if k % 2 else crest) * taper(x + pitch / 4))))
        if k % 2:
            crests.append(x)
        x += pitch / 2
        k += 1
    outline = top + [(tip, cy)] + bottom[::-1] + [(thread_start, cy + shank_r), (x_head - 1, cy + shank_r)]
    d.polygon(outline, fill=_tone(col))
    for xc in crests:                                                                # the helix, seen side on
        if xc + pitch / 2 < tip - 4:
            r1, r2 = crest * taper(xc) * 0.9, crest * taper(xc + pitch / 2) * 0.9
            d.line([(xc, cy - r1), (xc + pitch / 2, cy + r2)], fill=_tone(col, 0.55), width=3)
    d.rectangle((x0, cy - 6, x0 + 10, cy + 6), fill=(0, 0, 0, 0))                      # slot
    return _gain(im, _cylinder_gain(w, h, cy, crest + 4))


def _coil_spring(rng: Rng) -> Image.Image:
    R = rng.uniform(36, 58)
    turns = int(rng.integers(6, 13))
    hooks = rng.random() < 0.4
    pad = 24 + (1.7 * R if hooks else 0)
    w, h = int(2 * pad + rng.uniform(300, 420)), int(2 * R + 60)
    cy = h / 2
    pitch = (w - 2 * pad) / turns
    wire = rng.uniform(7, 12)
    ell = rng.uniform(0.2, 0.5) * pitch
    col = _metal(rng, {"steel": 6, "black": 2.5, "copper": 1.5})
    im, d = _canvas(w, h)
    t = np.linspace(0, 2 * math.pi * turns, turns * 64)
    xs = pad + pitch * t / (2 * math.pi) + ell * np.sin(t)
    ys = cy + R * np.cos(t)
    front = np.sin(t) >= 0
    if hooks:
        for end in (0, -1):
            hx = xs[end] - 0.8 * R if end == 0 else xs[end] + 0.8 * R
            d.ellipse(_circle(hx, cy, 0.8 * R), outline=_tone(col, 0.9), width=int(wire))
    for want in (False, True):                                                       # back coils first
        run: list[tuple[float, float]] = []
        for x, y, f in list(zip(xs, ys, front)) + [(0.0, 0.0, not want)]:
            if f == want:
                run.append((float(x), float(y)))
            elif run:
                d.line(run, fill=_tone(col, 1.0 if want else 0.72), width=int(wire), joint="curve")
                if want:
                    d.line([(px, py - wire / 4) for px, py in run], fill=_tone(col, 1.35), width=max(2, int(wire / 3)))
                run = []
    return _gain(im, _linear_gain(w, h, rng.uniform(0, 6.3), 0.8, 1.15))


def _spur_gear(rng: Rng) -> Image.Image:
    s, R = 320, 150
    c = s / 2
    n = int(rng.integers(12, 31))
    depth = min(0.22 * R, 2.25 * 2 * R / (n + 2))
    root = R - depth
    material = _pick(rng, {"brass": 3.5, "nylon": 2.5, "acetal": 2, "steel": 2})
    col = {"brass": _metal(rng, {"brass": 1}), "steel": _metal(rng, {"steel": 1}),
           "nylon": _jitter(rng, (236, 232, 220)), "acetal": _jitter(rng, (48, 48, 50), 6)}[material]
    im, d = _canvas(s, s)
    p = 2 * math.pi / n
    pts = []
    for i in range(n):
        a = i * p
        for r, da in ((root, -0.27 * p), (R, -0.13 * p), (R, 0.13 * p), (root, 0.27 * p)):
            pts.append((c + r * math.cos(a + da), c + r * math.sin(a + da)))
    d.polygon(pts, fill=_tone(col), outline=_tone(col, 0.6))
    hub = R * rng.uniform(0.26, 0.34)
    if rng.random() < 0.55:                                                          # recessed web
        d.ellipse(_circle(c, c, root - 0.1 * R), fill=_tone(col, 0.78))
        if rng.random() < 0.6:                                                       # lightening holes
            k, rr = int(rng.integers(4, 7)), (hub + root - 0.1 * R) / 2
            hr = min(0.14 * R, (root - 0.1 * R - hub) / 2 - 4)
            for j in range(k):
                a = 2 * math.pi * j / k
                d.ellipse(_circle(c + rr * math.cos(a), c + rr * math.sin(a), hr), fill=(0, 0, 0, 0))
        d.ellipse(_circle(c, c, hub), fill=_tone(col, 1.08))
    bore = R * rng.uniform(0.09, 0.15)
    d.ellipse(_circle(c, c, bore), fill=(0, 0, 0, 0))
    if rng.random() < 0.5:                                                           # keyway
        d.rectangle((c - bore * 0.3, c - bore * 1.3, c + bore * 0.3, c), fill=(0, 0, 0, 0))
    gain = (_conical_gain(s, s, rng.uniform(0, math.pi)) if material in ("brass", "steel")
            else _linear_gain(s, s, rng.uniform(0, 6.3), 0.8, 1.12))
    return _gain(im, gain)


def _cartridge_fuse(rng: Rng) -> Image.Image:
    w, h = 480, 150
    cy, r = h / 2, rng.uniform(25, 31)
    cap_len, x0, x1 = rng.uniform(58, 80), 18, w - 18
    cap = _metal(rng, {"nickel": 4, "brass": 1.5})
    im, d = _canvas(w, h)
    body = (x0 + cap_len - 6, cy - r, x1 - cap_len + 6, cy + r)
    if rng.random() < 0.72:                                                          # glass tube
        d.rectangle(body, fill=(222, 232, 236, int(rng.integers(70, 120))))
        blend = ImageDraw.Draw(im, "RGBA")
        wy = cy + rng.uniform(-0.3, 0.3) * r
        if rng.random() < 0.35:                                                      # slow-blow: a coiled element
            xs = np.linspace(x0 + cap_len, x1 - cap_len, 60)
            blend.line([(float(x), float(wy + 0.35 * r * math.sin(i * 1.2))) for i, x in enumerate(xs)],
                       fill=(95, 90, 85, 255), width=3)
        else:
            blend.line([(x0 + cap_len, cy), (w / 2, wy), (x1 - cap_len, cy)], fill=(90, 90, 92, 255), width=3)
        blend.rectangle((body[0], cy - 0.72 * r, body[2], cy - 0.5 * r), fill=(255, 255, 255, 150))
        blend.line([(body[0], cy - r + 1), (body[2], cy - r + 1)], fill=(120, 130, 135, 170), width=2)
        blend.line([(body[0], cy + r - 1), (body[2], cy + r - 1)], fill=(120, 130, 135, 170), width=2)
    else:                                                                            # ceramic body, printed rating
        d.rectangle(body, fill=_tone(_jitter(rng, (236, 232, 222))))
        for k in range(int(rng.integers(3, 6))):
            xa = w / 2 - 50 + k * 22
            d.rectangle((xa, cy - 6, xa + rng.uniform(8, 16), cy + 6), fill=(70, 70, 75, 255))
    for xa, xb in ((x0, x0 + cap_len), (x1 - cap_len, x1)):
        d.rounded_rectangle((xa, cy - r - 3, xb, cy + r + 3), radius=6, fill=_tone(cap))
        for rx in (xa + 8, xb - 8):
            d.line([(rx, cy - r - 2), (rx, cy + r + 2)], fill=_tone(cap, 0.7), width=2)
    return _gain(im, _cylinder_gain(w, h, cy, r + 3))


_BAND_COLOURS = ((20, 20, 20), (120, 70, 35), (205, 30, 30), (240, 125, 20), (245, 215, 30),
                 (40, 160, 60), (40, 80, 200), (140, 60, 170), (130, 130, 130), (245, 245, 245))


def _resistor(rng: Rng) -> Image.Image:
    bent = rng.random() < 0.35
    w, h = 480, 200 if bent else 130
    cy = 60 if bent else h / 2
    lead = (186, 186, 192, 255)
    im, d = _canvas(w, h)
    bx0, bx1 = w / 2 - rng.uniform(80, 100), w / 2 + rng.uniform(80, 100)
    if bent:
        for xa, inward in ((bx0 - 50, 8), (bx1 + 50, -8)):                        # legs bent for a board
            d.line([(w / 2, cy), (xa, cy), (xa + inward, cy + 12), (xa + inward, h - 8)],
                   fill=lead, width=5, joint="curve")
    else:
        d.line([(10, cy), (w - 10, cy)], fill=lead, width=5)
    rb = rng.uniform(25, 30)
    rm = rb * rng.uniform(0.78, 0.86)
    body_col = _jitter(rng, {"beige": (222, 196, 150), "blue": (105, 158, 212), "green": (150, 192, 162)}[
        _pick(rng, {"beige": 5, "blue": 3.5, "green": 1.5})], 8)
    body = Image.new("RGB", (w, h), body_col)
    mask = Image.new("L", (w, h), 0)
    md = ImageDraw.Draw(mask)
    md.ellipse((bx0, cy - rb, bx0 + 2.1 * rb, cy + rb), fill=255)
    md.ellipse((bx1 - 2.1 * rb, cy - rb, bx1, cy + rb), fill=255)
    md.rectangle((bx0 + rb, cy - rm, bx1 - rb, cy + rm), fill=255)
    bd = ImageDraw.Draw(body)
    n_bands = 5 if rng.random() < 0.3 else 4
    digits = [_BAND_COLOURS[int(i)] for i in rng.integers(0, 10, n_bands - 1)]
    tolerance = (212, 175, 55) if rng.random() < 0.7 else (200, 200, 205)
    bw = rng.uniform(9, 12)
    xs = list(np.linspace(bx0 + 0.8 * rb, bx0 + 0.8 * rb + (n_bands - 2) * 2.4 * bw, n_bands - 1)) + [bx1 - 1.4 * rb]
    for x, colour in zip(xs, digits + [tolerance]):
        bd.rectangle((x, 0, x + bw, h), fill=colour)
    im.paste(body, (0, 0), mask)
    return _gain(im, _cylinder_gain(w, h, cy, rb))


_WRAPPERS = (((25, 25, 25), (196, 120, 60)), ((30, 140, 60), (230, 200, 60)), ((40, 80, 190), (205, 205, 210)),
             ((200, 30, 35), (25, 25, 25)), ((240, 130, 20), (25, 25, 25)), ((200, 200, 205), (40, 80, 190)),
             ((240, 240, 235), (30, 140, 60)))


def _aa_battery(rng: Rng) -> Image.Image:
    w, h = 480, 150
    cy, r = h / 2, rng.uniform(45, 52)
    main, band = (_jitter(rng, c, 8) for c in _WRAPPERS[int(rng.integers(len(_WRAPPERS)))])
    x0, x1 = 26, w - 40
    im, d = _canvas(w, h)
    d.rounded_rectangle((x1 - 4, cy - 15, x1 + 18, cy + 15), radius=5, fill=(200, 200, 205, 255))   # + terminal
    d.rounded_rectangle((x0, cy - r, x1, cy + r), radius=9, fill=_tone(main))
    split = x0 + (x1 - x0) * rng.uniform(0.55, 0.78)
    if rng.random() < 0.5:
        d.rectangle((split, cy - r, x1 - 6, cy + r), fill=_tone(band))
    else:                                                                            # chevron band
        d.polygon([(split, cy - r), (x1 - 6, cy - r), (x1 - 6, cy + r), (split, cy + r), (split + 30, cy)],
                  fill=_tone(band))
    d.rectangle((x0, cy - r + 4, x0 + 6, cy + r - 4), fill=(190, 190, 195, 255))      # - end
    ink = (245, 245, 245, 255) if sum(main) < 380 else (30, 30, 30, 255)
    tx = x0 + rng.uniform(40, 70)
    for _ in range(int(rng.integers(3, 7))):                                         # a printed brand name
        tw = rng.uniform(10, 24)
        d.rectangle((tx, cy - 9, tx + tw, cy + 9), fill=ink)
        tx += tw + rng.uniform(4, 8)
    return _gain(im, _cylinder_gain(w, h, cy, r))


_LED_COLOURS = ((225, 35, 30), (40, 200, 60), (245, 210, 30), (40, 90, 230), (236, 240, 245))


def _led(rng: Rng) -> Image.Image:
    w, h = 240, 400
    cx, r = w / 2, rng.uniform(34, 40)
    top, bottom = 18, 18 + 2 * r + rng.uniform(50, 70)
    col = _jitter(rng, _LED_COLOURS[int(rng.integers(len(_LED_COLOURS)))], 8)
    diffused = rng.random() < 0.6
    im, d = _canvas(w, h)
    leg = (188, 188, 194, 255)
    splay = rng.uniform(0, 26) if rng.random() < 0.4 else 0.0
    for lx, length, side in ((cx - 14, rng.uniform(0.9, 0.97), -1), (cx + 14, rng.uniform(0.72, 0.84), 1)):
        end = bottom + 12 + (h - bottom - 20) * length
        d.line([(lx, bottom), (lx, bottom + 40), (lx + side * splay, end)], fill=leg, width=5, joint="curve")
    body = ImageDraw.Draw(im, "RGBA")
    alpha = 238 if diffused else 175
    body.ellipse((cx - r, top, cx + r, top + 2 * r), fill=_tone(col, 1.0, alpha))
    body.rectangle((cx - r, top + r, cx + r, bottom), fill=_tone(col, 1.0, alpha))
    body.rectangle((cx - r - 6, bottom - 4, cx + r + 2, bottom + 8), fill=_tone(col, 0.85, min(255, alpha + 15)))
    inner = 150 if not diffused else 70                                              # anvil and post
    body.polygon([(cx + 4, bottom - 8), (cx + 4, bottom - 40), (cx + 22, bottom - 46), (cx + 22, bottom - 8)],
                 fill=(70, 70, 75, inner))
    body.rectangle((cx - 18, bottom - 38, cx - 9, bottom - 8), fill=(80, 80, 85, inner))
    body.ellipse((cx - 0.6 * r, top + 0.25 * r, cx - 0.2 * r, top + 1.2 * r), fill=(255, 255, 255, 130))
    return _gain(im, _cylinder_gain(w, h, cx, r + 6, along_x=False))


def _key_blank(rng: Rng) -> Image.Image:
    w, h = 440, 200
    cy = h / 2
    metal = _metal(rng, {"brass": 6, "nickel": 3})
    im, d = _canvas(w, h)
    bow = _pick(rng, {"round": 4, "square": 2, "clover": 1.5})
    cap = _jitter(rng, ((200, 40, 40), (40, 90, 200), (40, 150, 70), (35, 35, 35))[int(rng.integers(4))], 6) \
        if rng.random() < 0.3 else metal
    if bow == "round":
        d.ellipse(_circle(90, cy, 70), fill=_tone(cap))
    elif bow == "square":
        d.rounded_rectangle((22, cy - 64, 160, cy + 64), radius=26, fill=_tone(cap))
    else:
        for dx, dy in ((62, 0), (112, -34), (112, 34)):
            d.ellipse(_circle(dx, cy + dy, 44), fill=_tone(cap))
    blade_top, blade_bot = cy - rng.uniform(20, 26), cy + rng.uniform(16, 22)
    d.rectangle((150, cy - 40, 172, cy + 30), fill=_tone(metal))                     # shoulder
    d.polygon([(160, blade_top), (w - 42, blade_top), (w - 14, cy + 2), (w - 14, blade_bot), (160, blade_bot)],
              fill=_tone(metal))
    for gy in (blade_top + 10, cy + 4):                                               # milled grooves
        d.line([(176, gy), (w - 40, gy)], fill=_tone(metal, 0.62), width=4)
    d.ellipse(_circle(48 if bow != "clover" else 40, cy, 13), fill=(0, 0, 0, 0))
    for k in range(int(rng.integers(2, 5))):                                          # stamped maker's mark
        d.rectangle((82 + k * 14, cy - 5, 92 + k * 14, cy + 5), fill=_tone(cap, 0.6))
    return _gain(im, _linear_gain(w, h, rng.uniform(0, 6.3), 0.74, 1.2))


PART_DRAWERS: dict[str, Callable[[Rng], Image.Image]] = {
    "hex_nut": _hex_nut, "washer": _washer, "wood_screw": _wood_screw, "coil_spring": _coil_spring,
    "spur_gear": _spur_gear, "cartridge_fuse": _cartridge_fuse, "resistor": _resistor,
    "aa_battery": _aa_battery, "led": _led, "key_blank": _key_blank}
assert tuple(PART_DRAWERS) == PART_CLASSES


# ---------------------------------------------------------------- odd ones out

def _mug(rng: Rng) -> Image.Image:
    s = 420
    c, R = s / 2 - 30, 150
    glaze = _jitter(rng, ((240, 240, 236), (200, 50, 45), (50, 90, 160), (230, 200, 90))[int(rng.integers(4))])
    im, d = _canvas(s, s)
    a = rng.uniform(0, 2 * math.pi)
    hx, hy = c + (R + 35) * math.cos(a), c + (R + 35) * math.sin(a)
    d.ellipse(_circle(hx, hy, 55), fill=_tone(glaze, 0.9))
    d.ellipse(_circle(hx, hy, 30), fill=(0, 0, 0, 0))
    d.ellipse(_circle(c, c, R), fill=_tone(glaze))
    d.ellipse(_circle(c, c, R * 0.86), fill=_tone(glaze, 0.8))
    d.ellipse(_circle(c, c, R * 0.8), fill=(72, 42, 22, 255))                           # coffee
    d.ellipse(_circle(c, c, R * 0.8), outline=(150, 105, 65, 255), width=6)
    d.ellipse(_circle(c - 0.3 * R, c - 0.3 * R, 0.12 * R), fill=(235, 225, 210, 255))    # window reflection
    return _gain(im, _linear_gain(s, s, rng.uniform(0, 6.3), 0.8, 1.15))


def _note_card(rng: Rng) -> Image.Image:
    w, h = 420, 280
    im, d = _canvas(w, h)
    d.rectangle((0, 0, w - 1, h - 1), fill=_tone(_jitter(rng, (246, 242, 228), 5)))
    for y in range(50, h - 10, 28):
        d.line([(0, y), (w, y)], fill=(150, 175, 215, 255), width=2)
    d.line([(48, 0), (48, h)], fill=(225, 120, 120, 255), width=2)
    ink = (30, 40, 120, 255) if rng.random() < 0.7 else (70, 70, 70, 255)
    for y in range(44, h - 20, 28):                                                  # handwriting
        x = 56 + rng.uniform(0, 10)
        end = w - rng.uniform(20, 160)
        while x < end:
            word = rng.uniform(25, 70)
            xs = np.linspace(x, x + word, int(word / 2))
            ys = y - 8 + 7 * np.sin(xs * rng.uniform(0.35, 0.6) + rng.uniform(0, 6)) * rng.uniform(0.5, 1)
            d.line(list(zip(xs.tolist(), ys.tolist())), fill=ink, width=2, joint="curve")
            x += word + rng.uniform(8, 16)
    return im


# ---------------------------------------------------------------- backgrounds (drawer liners) and clutter

def _bg_wood(rng: Rng, w: int, h: int) -> np.ndarray:
    vertical = rng.random() < 0.5
    W, H = (h, w) if vertical else (w, h)
    y = np.arange(H, dtype=np.float32)[:, None]
    warp = _smooth(rng, W, H, 3, 2) * rng.uniform(8, 30)
    rings = (0.5 + 0.5 * np.sin(2 * np.pi * (y + warp) / rng.uniform(18, 40))) ** 4
    fibre = _smooth(rng, W, H, 3, int(H / 1.5))
    t = 0.45 * rings + 0.35 * fibre + 0.2 * _smooth(rng, W, H, 3, 3)
    plank = rng.uniform(90, 200)
    seams = np.abs(((y + rng.uniform(0, plank)) % plank) - plank / 2) > plank / 2 - 1.5   # boards meet
    light = np.array(_jitter(rng, ((196, 150, 100), (170, 120, 75), (215, 185, 140))[int(rng.integers(3))], 10),
                     np.float32)
    img = light * (1 - 0.45 * t[..., None]) * np.where(seams, 0.55, 1.0)[..., None]
    return img.transpose(1, 0, 2) if vertical else img


def _bg_mat(rng: Rng, w: int, h: int) -> np.ndarray:
    base = np.array(_jitter(rng, ((46, 112, 86), (40, 70, 112), (62, 62, 68))[int(rng.integers(3))], 6), np.float32)
    line = np.array((190, 215, 200), np.float32)
    th, p = rng.uniform(-0.12, 0.12), rng.uniform(15, 26)
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    u = xx * math.cos(th) + yy * math.sin(th) + rng.uniform(0, p)
    v = -xx * math.sin(th) + yy * math.cos(th) + rng.uniform(0, p)

    def lines(c: np.ndarray, period: float, width: float) -> np.ndarray:
        dist = np.abs(((c + period / 2) % period) - period / 2)
        return np.clip(1.2 - dist / width, 0, 1)

    g = np.maximum(np.maximum(lines(u, p, 0.9), lines(v, p, 0.9)) * 0.35,
                   np.maximum(lines(u, 5 * p, 1.3), lines(v, 5 * p, 1.3)) * 0.7)
    mottle = 1 + 0.06 * (_smooth(rng, w, h, 6, 5) - 0.5)
    return (base + g[..., None] * (line - base)) * mottle[..., None]


def _bg_foam(rng: Rng, w: int, h: int) -> np.ndarray:
    base = np.array(_jitter(rng, ((62, 62, 66), (36, 40, 52), (96, 98, 102), (40, 58, 92))[int(rng.integers(4))], 5),
                    np.float32)
    grain = Image.fromarray(np.clip(128 + 50 * rng.standard_normal((h, w)), 0, 255).astype(np.uint8))
    grain = np.asarray(grain.filter(ImageFilter.GaussianBlur(1.4)), np.float32) / 128 - 1
    pores = np.ones((h, w), np.float32)
    n = w * h // 160
    pores[rng.integers(0, h, n), rng.integers(0, w, n)] = 0.55
    pores = np.asarray(Image.fromarray((pores * 255).astype(np.uint8)).filter(ImageFilter.GaussianBlur(0.7)),
                       np.float32) / 255
    return base * ((1 + 0.35 * grain) * pores)[..., None]


def _bg_cardboard(rng: Rng, w: int, h: int) -> np.ndarray:
    base = np.array(_jitter(rng, (184, 146, 100), 10), np.float32)
    yy = np.arange(h, dtype=np.float32)[:, None]
    corrugation = 1 + 0.035 * np.sin(2 * np.pi * yy / rng.uniform(9, 16))
    fibres = _smooth(rng, w, h, w // 3, h // 2) - 0.5
    stains = _smooth(rng, w, h, 4, 3)
    f = corrugation * (1 + 0.12 * fibres) * (1 - 0.12 * stains)
    return base * f[..., None]


def _bg_rubber(rng: Rng, w: int, h: int) -> np.ndarray:
    base = np.array(_jitter(rng, (44, 44, 46), 6), np.float32)
    xx = np.arange(w, dtype=np.float32)[None, :]
    ribs = 1 + 0.28 * np.sin(2 * np.pi * xx / rng.uniform(7, 12)) ** 2
    wear = 1 + 0.15 * (_smooth(rng, w, h, 5, 4) - 0.5)
    return base * (ribs * wear)[..., None] * np.ones((h, 1, 1), np.float32)


BACKGROUNDS = (_bg_wood, _bg_mat, _bg_foam, _bg_cardboard, _bg_rubber)


def _clutter(rng: Rng, w: int, h: int, n: int) -> Image.Image:
    """Things that are not parts lying in the drawer: crumbs, paper scraps, tape, threads, dust."""
    im = Image.new("RGBA", (w, h), (0, 0, 0, 0))
    d = ImageDraw.Draw(im, "RGBA")
    for _ in range(n):
        kind = _pick(rng, {"crumb": 3, "scrap": 2, "tape": 1, "thread": 1.5, "dust": 2})
        x, y = rng.uniform(0, w), rng.uniform(0, h)
        if kind in ("crumb", "scrap"):
            size = rng.uniform(2, 6) if kind == "crumb" else rng.uniform(10, 30)
            k = int(rng.integers(5, 9))
            pts = [(x + size * rng.uniform(0.5, 1) * math.cos(2 * math.pi * j / k),
                    y + size * rng.uniform(0.5, 1) * math.sin(2 * math.pi * j / k)) for j in range(k)]
            colour = _jitter(rng, (70, 55, 40)) if kind == "crumb" else _jitter(rng, (235, 232, 220), 12)
            d.polygon(pts, fill=_tone(colour, 1.0, 230))
        elif kind == "tape":
            a, L, T = rng.uniform(0, math.pi), rng.uniform(20, 45), rng.uniform(7, 12)
            ca, sa = math.cos(a), math.sin(a)
            d.polygon([(x + px * ca - py * sa, y + px * sa + py * ca) for px, py in
                       ((-L, -T), (L, -T), (L, T), (-L, T))], fill=(235, 220, 160, 90))
        elif kind == "thread":
            pts = [(x, y)]
            a = rng.uniform(0, 2 * math.pi)
            for _ in range(12):
                a += rng.uniform(-0.5, 0.5)
                pts.append((pts[-1][0] + 5 * math.cos(a), pts[-1][1] + 5 * math.sin(a)))
            d.line(pts, fill=_tone(_jitter(rng, (60, 60, 70), 30), 1.0, 200), width=1)
        else:
            for _ in range(int(rng.integers(5, 15))):
                d.point((x + rng.normal(0, 8), y + rng.normal(0, 8)), fill=(200, 195, 185, 160))
    return im


# ---------------------------------------------------------------- composing a photo

def _over(bg: np.ndarray, layer: Image.Image, at: tuple[int, int] = (0, 0)) -> None:
    """Alpha-composite an RGBA layer onto the float background in place (clipped to the frame)."""
    x, y = at
    lw, lh = layer.size
    h, w = bg.shape[:2]
    x0, y0, x1, y1 = max(0, x), max(0, y), min(w, x + lw), min(h, y + lh)
    if x0 >= x1 or y0 >= y1:
        return
    a = np.asarray(layer, np.float32)[y0 - y:y1 - y, x0 - x:x1 - x]
    alpha = a[..., 3:] / 255
    bg[y0:y1, x0:x1] = bg[y0:y1, x0:x1] * (1 - alpha) + a[..., :3] * alpha


def _shadow(bg: np.ndarray, layer: Image.Image, at: tuple[int, int], offset: tuple[float, float],
            blur: float, strength: float) -> None:
    pad = int(blur * 3 + 2)
    a = Image.new("L", (layer.width + 2 * pad, layer.height + 2 * pad), 0)
    a.paste(layer.getchannel("A"), (pad, pad))
    a = a.filter(ImageFilter.GaussianBlur(blur))
    x, y = at[0] - pad + int(round(offset[0])), at[1] - pad + int(round(offset[1]))
    dark = Image.new("RGBA", a.size, (0, 0, 0, 0))
    dark.putalpha(a.point(lambda v: int(v * strength)))
    _over(bg, dark, (x, y))


def _place(rng: Rng, layer: Image.Image, w: int, h: int, length: float,
           taken: list[tuple[int, int, int, int]]) -> tuple[Image.Image, tuple[int, int]]:
    """Rotate and scale a part so its longest side is about `length` and it fits the frame; choose the
    free-est of a few random spots."""
    rotated = layer.rotate(rng.uniform(0, 360), resample=Image.Resampling.BICUBIC, expand=True)
    f = min(length / max(layer.size), 0.94 * w / rotated.width, 0.94 * h / rotated.height)
    part = rotated.resize((max(1, int(rotated.width * f)), max(1, int(rotated.height * f))), Image.Resampling.LANCZOS)
    box = part.getbbox() or (0, 0, part.width, part.height)
    part = part.crop(box)
    # Keep the part near the central square: square-cropping embedders would cut off one at the far edge.
    side = min(w, h)
    x_lo, y_lo = max(0.03 * w, (w - side) / 2 - 0.06 * w), max(0.03 * h, (h - side) / 2 - 0.06 * h)
    x_hi, y_hi = min(0.97 * w, (w + side) / 2 + 0.06 * w), min(0.97 * h, (h + side) / 2 + 0.06 * h)
    best, best_overlap = (0, 0), None
    for _ in range(16):
        x = int(rng.uniform(x_lo, max(x_lo + 1, x_hi - part.width)))
        y = int(rng.uniform(y_lo, max(y_lo + 1, y_hi - part.height)))
        overlap = sum(max(0, min(x + part.width, bx1) - max(x, bx0)) * max(0, min(y + part.height, by1) - max(y, by0))
                      for bx0, by0, bx1, by1 in taken)
        if best_overlap is None or overlap < best_overlap:
            best, best_overlap = (x, y), overlap
        if overlap == 0:
            break
    taken.append((best[0], best[1], best[0] + part.width, best[1] + part.height))
    return part, best


def _luma(img: np.ndarray | Image.Image) -> float:
    """Mean brightness (ITU-R BT.601 weights), of the opaque pixels for a layer."""
    a = np.asarray(img, np.float32)
    y = a[..., 0] * 0.299 + a[..., 1] * 0.587 + a[..., 2] * 0.114
    if a.shape[-1] == 4:
        wgt = a[..., 3] / 255
        return float((y * wgt).sum() / max(1e-6, wgt.sum()))
    return float(y.mean())


def _compose(rng: Rng, kind: str, w: int, h: int) -> np.ndarray:
    """One arrangement, lit, before sensor noise: float32 (h, w, 3)."""
    layer = None
    if kind in PART_DRAWERS:
        layer = PART_DRAWERS[kind](rng)
    elif kind in ("mug", "note"):
        layer = _mug(rng) if kind == "mug" else _note_card(rng)
    for _ in range(4):                        # a black part on black foam would be lost even to a person
        bg = BACKGROUNDS[int(rng.integers(len(BACKGROUNDS)))](rng, w, h).astype(np.float32)
        if layer is None or abs(_luma(bg) - _luma(layer)) > 45:
            break
    _over(bg, _clutter(rng, w, h, int(rng.integers(2, 9 if kind == "empty" else 6))))
    light = rng.uniform(0, 2 * math.pi)
    reach = rng.uniform(0.01, 0.025) * min(w, h)
    offset = (-math.cos(light) * reach, -math.sin(light) * reach)
    blur, strength = rng.uniform(2, 5), rng.uniform(0.3, 0.6)
    side = min(w, h)
    if kind in PART_DRAWERS:
        n = int(_pick(rng, {1: 7, 2: 2, 3: 1}))
        base = side * (rng.uniform(0.55, 0.95) if n == 1 else rng.uniform(0.38, 0.58))
        if max(layer.size) > 1.8 * min(layer.size):                                   # elongated parts
            base *= 1.3
        taken: list[tuple[int, int, int, int]] = []
        for _ in range(n):
            part, at = _place(rng, layer, w, h, base * rng.uniform(0.9, 1.1), taken)
            _shadow(bg, part, at, offset, blur, strength)
            _over(bg, part, at)
    elif layer is not None:
        part, at = _place(rng, layer, w, h, side * rng.uniform(0.8, 1.1), [])
        _shadow(bg, part, at, offset, blur * 1.5, strength)
        _over(bg, part, at)
    yy, xx = np.mgrid[-1:1:h * 1j, -1:1:w * 1j].astype(np.float32)
    gradient = 1 + rng.uniform(0.08, 0.4) * (xx * math.cos(light) + yy * math.sin(light))
    vignette = 1 - rng.uniform(0, 0.3) * (xx ** 2 + yy ** 2) / 2
    temp = rng.uniform(-1, 1)                                                         # warm bulb .. cool daylight
    tint = np.array((1 + 0.1 * temp, 1 + 0.02 * temp, 1 - 0.12 * temp), np.float32)
    return bg * (gradient * vignette * rng.uniform(0.72, 1.12))[..., None] * tint


def _develop(rng: Rng, scene: np.ndarray, w: int, h: int, shift: tuple[int, int] = (0, 0),
             gain: float = 1.0) -> Image.Image:
    """Crop the frame out of a (possibly larger) scene, then add the camera's blur and noise."""
    m = (scene.shape[1] - w) // 2
    crop = scene[m + shift[1]:m + shift[1] + h, m + shift[0]:m + shift[0] + w] * gain
    crop = crop + rng.normal(0, rng.uniform(0.6, 2.0), crop.shape).astype(np.float32)
    im = Image.fromarray(np.clip(crop, 0, 255).astype(np.uint8))
    if rng.random() < 0.35:
        im = im.filter(ImageFilter.GaussianBlur(rng.uniform(0.3, 1.1)))
    return im


# ---------------------------------------------------------------- the folder plan and writing it

def _plan(rng: Rng, count: int) -> list[dict]:
    """Shots in shooting order; a burst's shots are consecutive and share one scene seed."""
    n_bursts = max(1, round(count / 85))
    burst_classes = rng.choice(len(PART_CLASSES), size=min(n_bursts, len(PART_CLASSES)), replace=False)
    burst_sizes = {PART_CLASSES[int(c)]: 3 + i % 3 for i, c in enumerate(burst_classes)}    # 3, 4, 5 shots
    items: list[list[str]] = []
    for i, cls in enumerate(PART_CLASSES):
        n = count // len(PART_CLASSES) + (1 if i < count % len(PART_CLASSES) else 0)
        k = min(burst_sizes.get(cls, 0), n)
        if k:
            items.append([cls] * k)
        items.extend([cls] for _ in range(n - k))
    items.extend([f"{ODD}:{kind}"] for kind in _ODD_KINDS)
    items.append([BROKEN])
    order = rng.permutation(len(items))
    items = [items[int(i)] for i in order]

    shares = np.cumsum([s for s, _ in _FOLDERS])
    number = int(rng.integers(100, 900))
    shots: list[dict] = []
    for pos, item in enumerate(items):
        folder = _FOLDERS[int(np.searchsorted(shares, (pos + 0.5) / len(items)))][1]
        if rng.random() < 0.05:
            number += int(rng.integers(1, 4))                                         # photos deleted in camera
        scene_seed = int(rng.integers(2 ** 63))
        size, portrait = _SIZES[int(rng.choice(len(_SIZES), p=_SIZE_WEIGHTS))], bool(rng.random() < 0.12)
        for shot in range(len(item)):
            label = item[shot]
            shots.append({"folder": folder, "number": number, "cls": ODD if label.startswith(ODD + ":") else label,
                          "kind": label.split(":", 1)[-1], "scene_seed": scene_seed,
                          "shot_seed": int(rng.integers(2 ** 63)), "burst": len(item) > 1,
                          "size": size, "portrait": portrait,
                          "format": "jpg", "exif": 0})
            number += 1
    singles = [s for s in shots if not s["burst"] and s["cls"] != BROKEN]
    picks = iter(rng.permutation(len(singles)).tolist())
    for _ in range(2):
        singles[next(picks)]["format"] = "webp"
    for _ in range(max(2, count // 50)):
        pick = singles[next(picks)]
        pick["format"], pick["size"], pick["portrait"] = "png", _SIZES[0], False     # PNGs are big: keep them small
    for tag in (6, 8):
        singles[next(picks)]["exif"] = tag
    return shots


def _encode(rng: Rng, im: Image.Image, shot: dict) -> bytes:
    buf = io.BytesIO()
    if shot["format"] == "png":
        if rng.random() < 0.7:                                                       # palette PNG
            im = im.quantize(256, method=Image.Quantize.MEDIANCUT)
        im.save(buf, "PNG", compress_level=9)
    elif shot["format"] == "webp":
        im.save(buf, "WEBP", quality=int(rng.integers(70, 86)), method=4)
    else:
        extra = {}
        if shot["exif"]:
            # Stored turned so that applying the tag brings it upright: 6 means "turn 90 degrees clockwise
            # to view" (EXIF 2.3 Orientation), so store it turned 90 degrees anticlockwise, and vice versa for 8.
            im = im.transpose(Image.Transpose.ROTATE_90 if shot["exif"] == 6 else Image.Transpose.ROTATE_270)
            exif = Image.Exif()
            exif[_EXIF_ORIENTATION] = shot["exif"]
            extra["exif"] = exif.tobytes()
        im.save(buf, "JPEG", quality=int(rng.integers(58, 84)), **extra)
    return buf.getvalue()


def _render(shot: dict) -> bytes:
    w, h = shot["size"][::-1] if shot["portrait"] else shot["size"]
    scene_rng, rng = np.random.default_rng(shot["scene_seed"]), np.random.default_rng(shot["shot_seed"])
    margin = 4 if shot["burst"] else 0
    kind = shot["kind"] if shot["cls"] != BROKEN else PART_CLASSES[int(scene_rng.integers(len(PART_CLASSES)))]
    scene = _compose(scene_rng, kind, w + 2 * margin, h + 2 * margin)
    if shot["burst"]:
        im = _develop(rng, scene, w, h, (int(rng.integers(-3, 4)), int(rng.integers(-3, 4))), rng.uniform(0.94, 1.06))
    else:
        im = _develop(rng, scene, w, h)
    data = _encode(rng, im, shot)
    if shot["cls"] == BROKEN:                                                        # cut off mid-scan
        data = data[:int(len(data) * rng.uniform(0.3, 0.45))]
    return data


def _clear_previous(out_dir: Path, truth_csv: Path, replace: bool) -> None:
    """Refuse to mix with other files; with replace, remove only the files a previous run listed in its truth."""
    existing = [p for p in out_dir.rglob("*") if p.is_file()
                and not any(part.startswith(".") for part in p.relative_to(out_dir).parts)] if out_dir.exists() else []
    if not existing:
        return
    if not replace:
        raise FileExistsError(f"{out_dir} already holds {len(existing)} files; pass replace=True (--replace) "
                              f"to regenerate a previous demo folder")
    known = load_demo_truth(truth_csv) if truth_csv.exists() else {}
    foreign = [p for p in existing if p.relative_to(out_dir).as_posix() not in known]
    if foreign:
        raise FileExistsError(f"{out_dir} holds {len(foreign)} files that {truth_csv} does not list "
                              f"(for example {foreign[0]}); nothing was removed")
    for p in existing:
        p.unlink()
    for d in sorted((p for p in out_dir.rglob("*") if p.is_dir()), key=lambda p: len(p.parts), reverse=True):
        if not any(d.iterdir()):
            d.rmdir()


_NOTE = ("Drawer photos from Saturday's sort-out. Volunteers: please go through these and put a name\n"
         "on each one. A few shots are doubles and one upload failed halfway; ignore the mug.\n")


def generate_demo(out_dir: str | os.PathLike, truth_csv: str | os.PathLike, seed: int = 7,
                  count: int = DEFAULT_COUNT, replace: bool = False,
                  progress: Callable[[int, int, str], None] | None = None) -> dict[str, str]:
    """Write the demo photos into out_dir and their truth (columns path,class) to truth_csv.

    `count` is the number of part photos (at least one per class); five odd ones out, one truncated JPEG
    and a stray notes.txt come on top. Returns {relative POSIX path: class} for every file written.
    """
    if count < len(PART_CLASSES):
        raise ValueError(f"count must be at least {len(PART_CLASSES)} (one photo per part class), got {count}")
    out, truth_path = Path(out_dir), Path(truth_csv)
    if truth_path.resolve().is_relative_to(out.resolve()):
        raise ValueError(f"keep the truth file {truth_path} outside the photo folder {out}")
    _clear_previous(out, truth_path, replace)
    shots = _plan(np.random.default_rng(seed), count)
    truth: dict[str, str] = {}
    for i, shot in enumerate(shots):
        rel = "/".join(p for p in (shot["folder"], f"IMG_{shot['number']:04d}.{shot['format']}") if p)
        (out / rel).parent.mkdir(parents=True, exist_ok=True)
        write_bytes(out / rel, _render(shot))
        truth[rel] = shot["cls"]
        if progress:
            progress(i + 1, len(shots), rel)
    write_bytes(out / "notes.txt", _NOTE.encode("utf-8"))
    truth["notes.txt"] = NON_IMAGE
    truth_path.parent.mkdir(parents=True, exist_ok=True)
    buf = io.StringIO(newline="")
    writer = csv.writer(buf)                                    # RFC 4180 quoting, CRLF line ends
    writer.writerow(("path", "class"))
    writer.writerows(sorted(truth.items()))
    write_bytes(truth_path, buf.getvalue().encode("utf-8"))
    return truth


def load_demo_truth(truth_csv: str | os.PathLike) -> dict[str, str]:
    """{relative POSIX path: class} from a truth file written by generate_demo."""
    with open(truth_csv, newline="", encoding="utf-8") as f:
        reader = csv.DictReader(f)
        if reader.fieldnames is None or not {"path", "class"} <= set(reader.fieldnames):
            raise ValueError(f"{truth_csv}: expected a header with columns path,class, got {reader.fieldnames}")
        return {row["path"]: row["class"] for row in reader}


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(prog="python -m app.demo", description=__doc__.split("\n\n")[0])
    ap.add_argument("--out", required=True, help="folder to write the photos into")
    ap.add_argument("--truth", required=True, help="CSV file for the true classes (keep it outside --out)")
    ap.add_argument("--seed", type=int, default=7)
    ap.add_argument("--count", type=int, default=DEFAULT_COUNT, help="number of part photos")
    ap.add_argument("--replace", action="store_true", help="remove a previous demo folder's files first")
    args = ap.parse_args(argv)
    try:
        truth = generate_demo(args.out, args.truth, args.seed, args.count, args.replace)
    except (FileExistsError, ValueError) as e:
        print(f"error: {e}", file=sys.stderr)
        return 2
    counts: dict[str, int] = {}
    for cls in truth.values():
        counts[cls] = counts.get(cls, 0) + 1
    print(f"wrote {len(truth)} files to {args.out}; truth in {args.truth}")
    print(", ".join(f"{k}: {v}" for k, v in sorted(counts.items())))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
