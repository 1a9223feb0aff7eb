"""Synthetic yard-camera scenes: a scenario of our own, deterministic from a seed.

A fixed camera looks down on a storage yard. Three kinds of objects matter:
crates (a square with a braced cross), drums (an ellipse with darker hoops)
and pylons (a triangle with light bands). Colour is random per object, so the
classes differ only by shape and texture. Distractors look similar but are
not objects: empty frames, rings, stars, bars and blobs. On top come ground
texture, clutter lines, occlusion (later shapes cover earlier ones), uneven
lighting, blur and sensor noise.

Object sides are log-uniform in 10..150 px, so at the native 320 x 320 the
annotations span the COCO small / medium / large area ranges (< 32^2, < 96^2,
>= 96^2 px). Boxes and areas are measured on the *visible* pixels; an object
less than 40 % visible is annotated iscrowd=1 (ignored by COCO evaluation),
one fully hidden is dropped.
"""
from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np

from speedbench.errors import UserError

SCENE_CLASSES = ("crate", "drum", "pylon")
SPLITS = ("train", "heldout", "calibration")   # appended: existing streams keep their index
DEFAULT_WIDTH = 320
DEFAULT_HEIGHT = 320

_MIN_SIDE, _MAX_SIDE = 10.0, 150.0
_CROWD_BELOW = 0.4  # visible fraction under which an object becomes an ignore region


def scene_rng(seed: int, split: str, index: int) -> np.random.Generator:
    """The generator of one scene: a distinct stream per (seed, split, index).

    Train and held-out scenes come from different SeedSequence entropy, so the
    two splits never share a scene for the same seed.
    """
    if split not in SPLITS:
        raise UserError(f"split must be one of {SPLITS}, not {split!r}")
    return np.random.default_rng([int(seed), SPLITS.index(split) + 1, int(index)])


def _rotate(points, angle, cx, cy):
    c, s = math.cos(angle), math.sin(angle)
    return [(cx + (x - cx) * c - (y - cy) * s, cy + (x - cx) * s + (y - cy) * c) for x, y in points]


def _shade(color, factor, add=0.0):
    return tuple(int(min(255, max(0, v * factor + add))) for v in color)


def _square(s, angle):
    pts = [(0, 0), (s, 0), (s, s), (0, s)]
    return _rotate(pts, angle, s / 2, s / 2)


def _fit(points):
    """Shift points to start at (1, 1); return them and the patch size."""
    xs = [p[0] for p in points]
    ys = [p[1] for p in points]
    pts = [(x - min(xs) + 1, y - min(ys) + 1) for x, y in points]
    return pts, (int(math.ceil(max(xs) - min(xs))) + 3, int(math.ceil(max(ys) - min(ys))) + 3)


def _draw_object(rng, cls, s, color):
    """Texture patch (RGB PIL image) and its shape mask (L) for one object of class `cls`."""
    from PIL import Image, ImageDraw

    dark, light = _shade(color, 0.45), _shade(color, 0.5, 120)
    if cls == "crate":
        pts, size = _fit(_square(s, rng.uniform(-0.45, 0.45)))
        tex = Image.new("RGB", size, color)
        mask = Image.new("L", size, 0)
        ImageDraw.Draw(mask).polygon(pts, fill=255)
        d = ImageDraw.Draw(tex)
        w = max(1, int(round(s / 9)))
        d.line([pts[0], pts[2]], fill=dark, width=w)
        d.line([pts[1], pts[3]], fill=dark, width=w)
        d.polygon(pts, outline=dark, width=max(1, int(round(s / 10))))
    elif cls == "drum":
        w, h = s * rng.uniform(0.7, 1.0), s
        size = (int(math.ceil(w)) + 2, int(math.ceil(h)) + 2)
        tex = Image.new("RGB", size, color)
        mask = Image.new("L", size, 0)
        ImageDraw.Draw(mask).ellipse([1, 1, w, h], fill=255)
        d = ImageDraw.Draw(tex)
        band = max(1, int(round(h / 11)))
        for frac in (0.3, 0.68):
            y = int(h * frac)
            d.rectangle([0, y, size[0], y + band], fill=dark)
        hx = int(w * 0.28)
        d.rectangle([hx, 0, hx + max(1, int(w / 9)), size[1]], fill=light)
    elif cls == "pylon":
        w, h = s * rng.uniform(0.6, 0.85), s
        pts = _rotate([(w / 2, 0), (w, h), (0, h)], rng.uniform(-0.3, 0.3), w / 2, h / 2)
        pts, size = _fit(pts)
        tex = Image.new("RGB", size, color)
        mask = Image.new("L", size, 0)
        ImageDraw.Draw(mask).polygon(pts, fill=255)
        d = ImageDraw.Draw(tex)
        band = max(1, int(round(h / 9)))
        ys = sorted(p[1] for p in pts)
        top, bottom = ys[0], ys[-1]
        for frac in (0.38, 0.66):
            y = int(top + (bottom - top) * frac)
            d.rectangle([0, y, size[0], y + band], fill=(235, 235, 225))
    else:  # pragma: no cover - internal
        raise ValueError(cls)
    return tex, mask


_DISTRACTORS = ("frame", "ring", "star", "bar", "blob")


def _draw_distractor(rng, kind, s, color):
    from PIL import Image, ImageDraw

    if kind == "frame":  # an empty square outline: like a crate without a body
        pts, size = _fit(_square(s, rng.uniform(-0.45, 0.45)))
        mask = Image.new("L", size, 0)
        ImageDraw.Draw(mask).polygon(pts, outline=255, width=max(1, int(round(s / 7))))
    elif kind == "ring":  # a hoop: like a drum without a body
        size = (int(s) + 2, int(s) + 2)
        mask = Image.new("L", size, 0)
        ImageDraw.Draw(mask).ellipse([1, 1, s, s], outline=255, width=max(1, int(round(s / 6))))
    elif kind == "star":  # pointed like a pylon
        r1, r2 = s / 2, s / 2 * rng.uniform(0.35, 0.5)
        a0 = rng.uniform(0, 2 * math.pi)
        pts = [((r1 if i % 2 == 0 else r2) * math.cos(a0 + i * math.pi / 5),
                (r1 if i % 2 == 0 else r2) * math.sin(a0 + i * math.pi / 5)) for i in range(10)]
        pts, size = _fit(pts)
        mask = Image.new("L", size, 0)
        ImageDraw.Draw(mask).polygon(pts, fill=255)
    elif kind == "bar":
        ln, th = s, max(2.0, s / rng.uniform(3, 7))
        pts = _rotate([(0, 0), (ln, 0), (ln, th), (0, th)], rng.uniform(0, math.pi), ln / 2, th / 2)
        pts, size = _fit(pts)
        mask = Image.new("L", size, 0)
        ImageDraw.Draw(mask).polygon(pts, fill=255)
    else:  # blob: an irregular polygon
        n = int(rng.integers(6, 10))
        ang = np.sort(rng.uniform(0, 2 * math.pi, n))
        rad = s / 2 * rng.uniform(0.45, 1.0, n)
        pts, size = _fit([(r * math.cos(a), r * math.sin(a)) for a, r in zip(ang, rad)])
        mask = Image.new("L", size, 0)
        ImageDraw.Draw(mask).polygon(pts, fill=255)
    tex = Image.new("RGB", mask.size, color)
    if rng.random() < 0.5:  # some distractors carry stripes too, so texture alone is not the cue
        d = ImageDraw.Draw(tex)
        step = max(3, int(s / 4))
        for y in range(0, mask.size[1], step):
            d.rectangle([0, y, mask.size[0], y + max(1, step // 3)], fill=_shade(color, 0.5))
    return tex, mask


def _background(rng, width, height):
    from PIL import Image, ImageDraw

    base = rng.uniform(60, 170, 3)
    coarse = rng.normal(0, 18, (6, 6, 3)) + base
    img = Image.fromarray(np.clip(coarse, 0, 255).astype(np.uint8)).resize((width, height), Image.BILINEAR)
    d = ImageDraw.Draw(img)
    for _ in range(int(rng.integers(3, 12))):  # clutter: cracks, tracks, cables
        pts = [tuple(p) for p in rng.uniform(0, [width, height], (int(rng.integers(2, 5)), 2))]
        d.line(pts, fill=tuple(int(v) for v in rng.uniform(20, 230, 3)), width=int(rng.integers(1, 4)))
    for _ in range(int(rng.integers(10, 40))):  # pebbles
        x, y = rng.uniform(0, [width, height])
        r = rng.uniform(1, 4)
        d.ellipse([x - r, y - r, x + r, y + r], fill=tuple(int(v) for v in rng.uniform(30, 220, 3)))
    return img


def render_scene(rng: np.random.Generator, width: int = DEFAULT_WIDTH, height: int = DEFAULT_HEIGHT):
    """Draw one scene. Returns (uint8 [H, W, 3] RGB image, list of annotation dicts).

    Each annotation: {"category_id": 1..len(SCENE_CLASSES), "bbox": [x, y, w, h] (visible
    pixels), "area": visible pixel count, "iscrowd": 0 or 1}.
    """
    from PIL import ImageFilter

    img = _background(rng, width, height)
    canvas = np.array(img)
    owner = np.zeros((height, width), dtype=np.int16)  # 0 ground, k object k, -1 distractor
    n_obj = int(rng.integers(2, 8))
    n_dis = int(rng.integers(1, 6))
    order = rng.permutation(np.r_[np.ones(n_obj, int), np.zeros(n_dis, int)])
    objects = []  # (class index, full pixel count)
    log_lo, log_hi = math.log(_MIN_SIDE), math.log(_MAX_SIDE)
    for is_obj in order:
        color = tuple(int(v) for v in rng.uniform(35, 230, 3))
        if is_obj:
            cls = int(rng.integers(len(SCENE_CLASSES)))
            side = math.exp(rng.uniform(log_lo, log_hi))
            tex, mask = _draw_object(rng, SCENE_CLASSES[cls], side, color)
        else:
            kind = _DISTRACTORS[int(rng.integers(len(_DISTRACTORS)))]
            side = math.exp(rng.uniform(math.log(8), math.log(120)))
            tex, mask = _draw_distractor(rng, kind, side, color)
        m = np.asarray(mask) > 127
        ph, pw = m.shape
        if pw >= width or ph >= height:
            continue
        x = int(rng.integers(0, width - pw + 1))
        y = int(rng.integers(0, height - ph + 1))
        region = canvas[y:y + ph, x:x + pw]
        region[m] = np.asarray(tex)[m]
        if is_obj:
            objects.append((cls, int(m.sum())))
            owner[y:y + ph, x:x + pw][m] = len(objects)
        else:
            owner[y:y + ph, x:x + pw][m] = -1

    # Lighting: a gain ramp in a random direction, then blur and sensor noise.
    a = rng.uniform(0, 2 * math.pi)
    scale = max(width, height)
    ramp = (np.arange(width, dtype=np.float32)[None, :] * (math.cos(a) / scale)
            + np.arange(height, dtype=np.float32)[:, None] * (math.sin(a) / scale))
    gain = rng.uniform(0.6, 1.2) + rng.uniform(-0.35, 0.35) * ramp
    out = canvas.astype(np.float32) * gain[..., None]
    from PIL import Image

    blur = rng.uniform(0, 1.0)
    if blur > 0.5:
        out = np.asarray(Image.fromarray(np.clip(out, 0, 255).astype(np.uint8))
                         .filter(ImageFilter.GaussianBlur(blur - 0.4)), dtype=np.float32)
    out += rng.standard_normal(out.shape, dtype=np.float32) * np.float32(rng.uniform(2, 12))
    image = np.clip(out, 0, 255).astype(np.uint8)

    anns = []
    ys_all, xs_all = np.nonzero(owner > 0)
    ids = owner[ys_all, xs_all]
    for k, (cls, full) in enumerate(objects, start=1):
        sel = ids == k
        ys, xs = ys_all[sel], xs_all[sel]
        if len(xs) == 0:
            continue  # fully hidden
        x0, y0 = int(xs.min()), int(ys.min())
        anns.append({
            "category_id": cls + 1,
            "bbox": [float(x0), float(y0), float(xs.max() - x0 + 1), float(ys.max() - y0 + 1)],
            "area": float(len(xs)),
            "iscrowd": int(len(xs) < _CROWD_BELOW * full),
        })
    return image, anns


def make_scenes(out_dir, count: int, seed: int, split: str = "heldout",
                width: int = DEFAULT_WIDTH, height: int = DEFAULT_HEIGHT, fmt: str = "png") -> Path:
    """Write `count` scenes to out_dir/images/ and out_dir/annotations.json (COCO format).

    Deterministic: the same (count, seed, split, size) gives identical bytes.
    Returns the path of annotations.json.
    """
    from PIL import Image

    if int(count) <= 0:
        raise UserError(f"--count must be a positive number of images, not {count}")
    if split not in SPLITS:
        raise UserError(f"--split must be one of {SPLITS}, not {split!r}")
    if width < 64 or height < 64:
        raise UserError(f"scene size must be at least 64 x 64 px, not {width} x {height}")
    if fmt not in ("png", "jpg"):
        raise UserError(f"image format must be png or jpg, not {fmt!r}")
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise UserError(f"{out}: exists and is not a directory")
    (out / "images").mkdir(parents=True, exist_ok=True)

    images, annotations = [], []
    for i in range(int(count)):
        image, anns = render_scene(scene_rng(seed, split, i), width, height)
        name = f"images/{split}_{i:05d}.{fmt}"
        pil = Image.fromarray(image)
        if fmt == "png":
            pil.save(out / name, compress_level=1)
        else:
            pil.save(out / name, quality=92)
        images.append({"id": i + 1, "file_name": name, "width": width, "height": height})
        for a in anns:
            annotations.append({"id": len(annotations) + 1, "image_id": i + 1, **a})
    coco = {
        "info": {"description": f"speedbench synthetic yard scenes, split={split}, seed={seed}"},
        "images": images,
        "annotations": annotations,
        "categories": [{"id": k + 1, "name": n, "supercategory": "yard"}
                       for k, n in enumerate(SCENE_CLASSES)],
    }
    path = out / "annotations.json"
    path.write_text(json.dumps(coco, indent=1))
    return path
