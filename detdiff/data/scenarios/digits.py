"""The digits scenario: real handwritten digits painted as house numbers and stencilled marks on real photographs.

Every object's pixels come from open data that ships inside two packages, nothing downloaded:
scikit-learn's handwritten digits (``sklearn.datasets.load_digits``: 1,797 real 8 x 8 scans, ten
classes; the UCI "Optical Recognition of Handwritten Digits" set) upscaled with cubic interpolation,
and scikit-image's bundled pictures as backgrounds (brick, grass and gravel textures; the camera,
coffee, rocket, astronaut and cat photographs). Digits stand in groups side by side as house numbers
(neighbours touching or overlapping) on plates, painted on the surface or stencilled, with ink colours
varying, heights from about 10 to 90 px, a slight tilt only (a flipped 2 is not a 2), Benford-like
long-tailed class frequencies (1 commonest, 9 rarest, about 8 to 1), clutter strokes, blur and dim light.

Label faults are planted by :mod:`detdiff.data.scenarios.faults` with a wrong class drawn in
proportion to class frequency within the digit's look-alike group and loose boxes of IoU 0.45-0.70.
Each truth object records ``sample_index``, its row in ``load_digits()``. ``demo/README.md``
documents the scene; the seeding contract is that of the faults module.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import cv2
import numpy as np

from detdiff.data.scenarios.drawing import (
    Scene, jitter_colour, light_and_lens, object_record, put_object, settle_visibility)
from detdiff.data.scenarios.faults import (
    HELD_OUT_FAULT_RATES, DemoPaths, LooseBoxes, check_fault_rates, draw_images, look_alike_confusions,
    write_dataset)

SCENARIO = "handwritten digits as house numbers and stencilled marks on walls, ground and photographs"

#: (COCO id, name, supercategory) for digits 0-9 in order. Ids are not contiguous and do not start at 0 or 1.
CATEGORIES: tuple[tuple[int, str, str], ...] = tuple((50 + 3 * d, f"digit_{d}", "digit") for d in range(10))
NAMES = tuple(name for _, name, _ in CATEGORIES)
#: Share of digits per class 0-9: Benford-like for 1-9 (leading digits of house numbers), 0 in between.
CLASS_FREQUENCY = np.array([0.095, 0.27, 0.16, 0.115, 0.09, 0.075, 0.063, 0.055, 0.043, 0.034])
#: Digits that handwriting makes look alike; a planted wrong class stays inside the digit's group.
#: Grouped so that each group's members are of similar frequency: the written class then says little.
LOOK_ALIKE_GROUPS: tuple[tuple[str, ...], ...] = (
    ("digit_1", "digit_2", "digit_7"), ("digit_3", "digit_5", "digit_8"),
    ("digit_0", "digit_4", "digit_6", "digit_9"))
#: Loose boxes: IoU 0.45-0.70 with the clean box, grown and shifted as in the warehouse.
LOOSE_BOXES = LooseBoxes(iou=(0.45, 0.70))

#: Image sizes (width, height), landscape and portrait, and how often each is drawn.
IMAGE_SIZES: tuple[tuple[int, int], ...] = (
    (640, 480), (800, 600), (1024, 768), (1280, 960), (1600, 1200), (480, 640), (768, 1024), (900, 1200))
IMAGE_SIZE_WEIGHTS = np.array([0.2, 0.2, 0.2, 0.1, 0.1, 0.1, 0.05, 0.05])
#: scikit-image pictures: (name, kind); textures are grey and tinted, photographs used as they are.
BACKGROUNDS: tuple[tuple[str, str], ...] = (
    ("brick", "texture"), ("grass", "texture"), ("gravel", "texture"), ("camera", "photo"),
    ("coffee", "photo"), ("rocket", "photo"), ("astronaut", "photo"), ("chelsea", "photo"))
TEXTURE_TINT: dict[str, tuple[float, float, float]] = {          # BGR gains for the grey textures
    "brick": (0.62, 0.72, 1.05), "grass": (0.7, 1.05, 0.75), "gravel": (0.9, 0.95, 1.0)}
DIGIT_HEIGHT: tuple[float, float] = (10.0, 90.0)       # px, drawn log-uniform per group
#: Share of images with each condition (drawn independently per image).
IMAGE_CONDITION_RATES: dict[str, float] = {"blur": 0.12, "dim": 0.12, "clutter": 0.35, "crowded": 0.3}
STYLES: tuple[tuple[str, float], ...] = (("plate", 0.45), ("painted", 0.35), ("stencil", 0.2))
GROUP_SIZES = np.array([0.2, 0.3, 0.3, 0.15, 0.05])  # P(1..5 digits in a group)
TRUNCATED_RATE = 0.12       # share of groups placed across the image border
INK_ALPHA = 0.35            # a pixel belongs to the digit (its box and mask) where its ink cover is at least this
MIN_VISIBLE = 0.55          # a digit keeps at least this share of its in-image pixels visible (neighbours overlap)
TINY_SIDE = 16              # a digit whose box's longer side is under this many px is recorded tiny
JPEG_QUALITY = 90

BGR = tuple[float, float, float]
#: (plate colour, ink colour) pairs for house-number plates.
PLATES: tuple[tuple[BGR, BGR], ...] = (
    ((235, 235, 232), (30, 30, 30)), ((140, 70, 20), (240, 240, 240)), ((30, 30, 32), (90, 190, 225)),
    ((90, 150, 190), (25, 30, 40)), ((60, 110, 50), (235, 235, 235)))
PAINTS: tuple[BGR, ...] = ((240, 240, 240), (25, 25, 25), (30, 210, 240), (40, 40, 190), (180, 90, 30))


@functools.lru_cache(maxsize=1)
def _digits() -> tuple[np.ndarray, np.ndarray]:
    """The 1,797 real samples as ``float32 [N, 8, 8]`` ink cover in 0..1, and their labels."""
    try:
        from sklearn.datasets import load_digits
    except ImportError as exc:
        raise ImportError("the digits scenario needs scikit-learn (pip install scikit-learn)") from exc
    data = load_digits()
    return (data.images / 16.0).astype(np.float32), data.target.astype(np.int64)


@functools.lru_cache(maxsize=len(BACKGROUNDS))
def _picture(name: str) -> np.ndarray:
    """A scikit-image picture as ``uint8 [H, W, 3]`` BGR (grey ones copied to three channels)."""
    try:
        import skimage.data
    except ImportError as exc:
        raise ImportError("the digits scenario needs scikit-image (pip install scikit-image)") from exc
    pixels = np.asarray(getattr(skimage.data, name)())
    if pixels.ndim == 2:
        return np.repeat(pixels[:, :, None], 3, axis=2)
    return np.ascontiguousarray(pixels[:, :, 2::-1])


def _background(rng: np.random.Generator, name: str, kind: str, width: int, height: int) -> np.ndarray:
    """``float32 [H, W, 3]`` background: a texture tiled by mirroring and tinted, or a photo scaled to cover."""
    source = _picture(name)
    h, w = source.shape[:2]
    if kind == "texture":
        scale = rng.uniform(0.8, 2.0)
        tile = cv2.resize(source, (round(w * scale), round(h * scale)), interpolation=cv2.INTER_LINEAR)
        reps = (math.ceil(height / tile.shape[0]) + 1, math.ceil(width / tile.shape[1]) + 1)
        tile = np.pad(tile, ((0, (reps[0] - 1) * tile.shape[0]), (0, (reps[1] - 1) * tile.shape[1]), (0, 0)),
                      mode="symmetric")
        gain = np.asarray(TEXTURE_TINT[name], dtype=np.float32) * np.float32(rng.uniform(0.85, 1.15))
    else:
        scale = max(width / w, height / h) * rng.uniform(1.0, 1.4)
        tile = cv2.resize(source, (math.ceil(w * scale), math.ceil(h * scale)), interpolation=cv2.INTER_LINEAR)
        if rng.random() < 0.5:
            tile = tile[:, ::-1]
        gain = np.ones(3, dtype=np.float32)
    y0 = int(rng.integers(0, tile.shape[0] - height + 1))
    x0 = int(rng.integers(0, tile.shape[1] - width + 1))
    return tile[y0:y0 + height, x0:x0 + width].astype(np.float32) * gain


@dataclass
class Glyph:
    """One digit ready to paint: ink cover ``alpha [L, L]`` with its centre at pixel (c, c), class, sample, ink."""

    alpha: np.ndarray
    c: int
    digit: int
    sample: int
    ink: np.ndarray
    opacity: float


def _glyph(rng: np.random.Generator, sample: int, digit: int, height: float, aspect: float, tilt: float,
           stencil: bool) -> Glyph:
    """Upscale one real 8 x 8 sample (cubic) to ``height`` px, tilt it by ``tilt`` rad, cut stencil bridges."""
    images, _ = _digits()
    h = max(6, round(height))
    w = max(5, round(height * aspect))
    cover = cv2.resize(images[sample], (w, h), interpolation=cv2.INTER_CUBIC)
    cover = np.clip((cover - 0.12) / 0.7, 0.0, 1.0)
    if stencil and h >= 20:                        # stencil bridges: thin uncut strips across the strokes
        for y in rng.choice(np.arange(int(0.25 * h), int(0.75 * h)), 2, replace=False):
            cover[y:y + max(1, h // 18)] = 0.0
    c = int(math.ceil(0.5 * math.hypot(h, w))) + 2
    square = np.zeros((2 * c + 1, 2 * c + 1), dtype=np.float32)
    y0, x0 = c - h // 2, c - w // 2
    square[y0:y0 + h, x0:x0 + w] = cover
    turn = cv2.getRotationMatrix2D((float(c), float(c)), math.degrees(tilt), 1.0)
    square = cv2.warpAffine(square, turn, square.shape[::-1], flags=cv2.INTER_LINEAR)
    return Glyph(square, c, digit, sample, np.zeros(3), 1.0)


def _ink_span(glyph: Glyph) -> tuple[int, int]:
    """Leftmost and rightmost ink column of a glyph, relative to its centre column."""
    cols = np.nonzero((glyph.alpha >= INK_ALPHA).any(axis=0))[0]
    return int(cols.min()) - glyph.c, int(cols.max()) - glyph.c


def _group(rng: np.random.Generator, pools: list[np.ndarray], crowded: bool, style: str
           ) -> tuple[list[Glyph], list[tuple[float, float]], float, float]:
    """A house number: glyphs, centres relative to (left ink edge, mid-height), ink width and digit height.

    Neighbours touch or overlap (a negative gap) in crowded images and mostly stand apart otherwise.
    """
    count = 1 + int(rng.choice(len(GROUP_SIZES), p=GROUP_SIZES))
    height = float(np.exp(rng.uniform(*np.log(DIGIT_HEIGHT))))
    aspect = rng.uniform(0.8, 1.05)
    tilt = float(np.clip(rng.normal(0, 0.05), -0.14, 0.14))
    glyphs, centres = [], []
    x = 0.0
    for k in range(count):
        digit = int(rng.choice(10, p=CLASS_FREQUENCY / CLASS_FREQUENCY.sum()))
        sample = int(pools[digit][int(rng.integers(len(pools[digit])))])
        glyph = _glyph(rng, sample, digit, height * rng.uniform(0.96, 1.04), aspect,
                       tilt + float(np.clip(rng.normal(0, 0.03), -0.06, 0.06)), style == "stencil")
        left, right = _ink_span(glyph)
        gap = 0.0 if k == 0 else height * (rng.uniform(-0.18, 0.03) if crowded else rng.uniform(-0.1, 0.15))
        cx = x + gap - left
        centres.append((cx, math.tan(tilt) * cx + rng.normal(0, 0.03 * height)))
        glyphs.append(glyph)
        x = cx + right
    return glyphs, centres, x, height


def _group_origin(rng: np.random.Generator, width: int, height: int, span: float, half: float,
                  truncate: bool) -> tuple[float, float]:
    """Left ink edge and mid-height of a group ``span`` px wide, ``2 * half`` px high: inside, or across a border."""
    x_inside = (half, max(half + 1.0, width - span - half))
    y_inside = (half, max(half + 1.0, height - half))
    if not truncate:
        return rng.uniform(*x_inside), rng.uniform(*y_inside)
    edge = int(rng.integers(4))                     # left, right, top, bottom
    if edge < 2:
        x = rng.uniform(-0.7, -0.2) * span if edge == 0 else width - rng.uniform(0.3, 0.8) * span
        return x, rng.uniform(*y_inside)
    y = rng.uniform(-0.3, 0.1) * half if edge == 2 else height - rng.uniform(-0.1, 0.3) * half
    return rng.uniform(*x_inside), y


def _ink(rng: np.random.Generator, style: str, plate: BGR | None) -> tuple[np.ndarray, float]:
    """Ink colour and opacity for a group: the plate's lettering, or paint on the surface."""
    if plate is not None:
        match = [ink for p, ink in PLATES if p == plate][0]
        return jitter_colour(rng, match, 6, (0.92, 1.08)), float(rng.uniform(0.9, 1.0))
    paint = PAINTS[int(rng.integers(len(PAINTS)))]
    return jitter_colour(rng, paint, 8, (0.9, 1.1)), float(rng.uniform(0.75, 0.95) if style == "painted" else 0.9)


def _clutter(rng: np.random.Generator, image: np.ndarray, count: int) -> None:
    """Strokes that are not digits (cables, cracks, scribbles) and faint stains, drawn on the background."""
    H, W = image.shape[:2]
    for _ in range(count):
        if rng.random() < 0.7:
            steps = int(rng.integers(6, 16))
            heading = rng.uniform(0, 2 * math.pi) + np.cumsum(rng.normal(0, 0.3, steps))
            seg = rng.uniform(8, 40, steps)
            start = rng.uniform([0, 0], [W, H])
            pts = start + np.vstack([[0.0, 0.0], np.cumsum(np.stack([np.cos(heading), np.sin(heading)], 1)
                                                            * seg[:, None], 0)])
            tone = float(rng.choice([25.0, 60.0, 200.0]))
            cv2.polylines(image, [np.rint(pts * 4).astype(np.int32)], False, (tone, tone, tone),
                          int(rng.integers(1, 5)), cv2.LINE_AA, 2)
        else:
            centre = (int(rng.integers(0, W)), int(rng.integers(0, H)))
            axes = (int(rng.integers(10, 60)), int(rng.integers(6, 40)))
            stain = image.copy()
            cv2.ellipse(stain, centre, axes, float(rng.uniform(0, 180)), 0, 360, (40, 45, 50), -1, cv2.LINE_AA)
            image[:] = cv2.addWeighted(image, 0.75, stain, 0.25, 0.0)


def _paint(image: np.ndarray, glyph: Glyph, centre: tuple[int, int], wear: np.ndarray | None) -> None:
    """Blend the glyph's ink into ``image`` (float32 BGR) at ``centre``, within the image only."""
    H, W = image.shape[:2]
    L = glyph.alpha.shape[0]
    x0, y0 = centre[0] - glyph.c, centre[1] - glyph.c
    ix0, iy0, ix1, iy1 = max(0, x0), max(0, y0), min(W, x0 + L), min(H, y0 + L)
    if ix1 <= ix0 or iy1 <= iy0:
        return
    a = glyph.alpha[iy0 - y0:iy1 - y0, ix0 - x0:ix1 - x0] * np.float32(glyph.opacity)
    if wear is not None:
        a = a * wear[iy0:iy1, ix0:ix1]
    region = image[iy0:iy1, ix0:ix1]
    region += a[:, :, None] * (glyph.ink.astype(np.float32) - region)


def _image(rng: np.random.Generator, image_id: int, pools: list[np.ndarray]
           ) -> tuple[np.ndarray, dict[str, Any], list[dict[str, Any]]]:
    """Paint one image: size, background, groups of digits, clutter, light and lens; its record and objects."""
    width, height = IMAGE_SIZES[int(rng.choice(len(IMAGE_SIZES), p=IMAGE_SIZE_WEIGHTS))]
    conditions = {k: bool(rng.random() < p) for k, p in IMAGE_CONDITION_RATES.items()}
    name, kind = BACKGROUNDS[int(rng.integers(len(BACKGROUNDS)))]
    image = _background(rng, name, kind, width, height)
    if conditions["clutter"]:
        _clutter(rng, image, int(rng.integers(4, 12)))
    wear = 1.0 - 0.5 * np.clip(cv2.resize(rng.random((height // 16, width // 16), dtype=np.float32),
                                          (width, height), interpolation=cv2.INTER_CUBIC), 0, 1)
    scene = Scene(width, height, conditions, owner=np.full((height, width), -1, dtype=np.int16))
    glyphs: list[Glyph] = []
    extras: list[dict[str, Any]] = []
    taken: list[tuple[float, float, float, float]] = []          # group rectangles (x0, y0, x1, y1) with margin
    groups = int(rng.integers(4, 9)) if conditions["crowded"] else int(rng.integers(1, 5))
    style_p = np.array([p for _, p in STYLES])
    for _ in range(groups):
        style = STYLES[int(rng.choice(len(STYLES), p=style_p))][0]
        members, offsets, span, size = _group(rng, pools, conditions["crowded"], style)
        margin = 0.3 * size
        truncate = bool(rng.random() < TRUNCATED_RATE)
        for _ in range(20):
            gx, gy = _group_origin(rng, width, height, span, 0.8 * size, truncate)
            box = (gx - margin, gy - 0.5 * size - margin, gx + span + margin, gy + 0.5 * size + margin)
            if not any(box[0] < t[2] and t[0] < box[2] and box[1] < t[3] and t[1] < box[3] for t in taken):
                break
        else:
            continue
        taken.append(box)
        plate = PLATES[int(rng.integers(len(PLATES)))][0] if style == "plate" else None
        if plate is not None:
            colour = tuple(float(v) for v in jitter_colour(rng, plate, 6, (0.92, 1.08)))
            corners = np.rint(np.array(box).reshape(2, 2) * 4 + [[2, 2], [-2, -2]]).astype(np.int32)
            p0, p1 = (tuple(int(v) for v in corner) for corner in corners)
            cv2.rectangle(image, p0, p1, colour, -1, cv2.LINE_AA, 2)
            cv2.rectangle(image, p0, p1, tuple(0.6 * v for v in colour), max(1, round(0.05 * size)), cv2.LINE_AA, 2)
        ink, opacity = _ink(rng, style, plate)
        for glyph, (dx, dy) in zip(members, offsets):
            glyph.ink, glyph.opacity = ink, opacity
            placed = put_object(scene, glyph.digit, glyph.alpha >= INK_ALPHA, glyph.c,
                                (int(round(gx + dx)), int(round(gy + dy))), ops=[], min_visible=MIN_VISIBLE,
                                in_group=len(members) > 1)
            if placed is None:
                continue
            placed.tiny = max(placed.bbox[2], placed.bbox[3]) < TINY_SIDE
            glyphs.append(glyph)
            extras.append({"sample_index": glyph.sample, "style": style, "group_size": len(members)})
    settle_visibility(scene)
    for glyph, obj in zip(glyphs, scene.objects):
        _paint(image, glyph, obj.centre, wear if glyph.opacity < 0.9 else None)
    scale = min(width, height) / 600.0
    pixels, strength = light_and_lens(rng, np.clip(image, 0, 255).astype(np.uint8), dim=conditions["dim"],
                                      blur=conditions["blur"], u=scale)
    record = {"width": width, "height": height, "background": name, **conditions, **strength}
    return pixels, record, [{**object_record(obj, image_id), **extra} for obj, extra in zip(scene.objects, extras)]


def generate(out_dir: str | Path, *, num_images: int = 300, seed: int = 0,
             fault_rates: dict[str, float] | None = None, progress: bool = True) -> DemoPaths:
    """Paint the digits scenario and write it as a COCO dataset with planted label faults.

    Parameters
    ----------
    out_dir : folder to write ``annotations.json`` (COCO, faults included), ``images/*.jpg`` and
        ``truth.json`` (clean objects with their ``sample_index``, image conditions, planted faults).
    num_images : how many images to paint; each gets its own size from :data:`IMAGE_SIZES`.
    seed : everything (pixels, ids, faults) follows from it; the same seed writes the same bytes.
    fault_rates : share of objects for each fault kind, keys among ``wrong_class``, ``missing_box``,
        ``loose_box``, ``duplicate_box``; missing keys keep
        :data:`~detdiff.data.scenarios.faults.HELD_OUT_FAULT_RATES` (5% each, 1% duplicates).
    progress : show a tqdm bar while painting.

    Returns
    -------
    DemoPaths with the three paths written.
    """
    rates = check_fault_rates(fault_rates, HELD_OUT_FAULT_RATES)
    _, labels = _digits()
    pools = [np.nonzero(labels == d)[0] for d in range(10)]
    streams, images, objects = draw_images(Path(out_dir), num_images=num_images, seed=seed, stem="digits",
                                           quality=JPEG_QUALITY, progress=progress,
                                           draw=functools.partial(_image, pools=pools))
    confusions = look_alike_confusions(NAMES, CLASS_FREQUENCY, LOOK_ALIKE_GROUPS)
    return write_dataset(out_dir, scenario=SCENARIO, seed=seed, streams=streams, categories=CATEGORIES,
                         confusions=confusions, images=images, objects=objects, rates=rates,
                         loose=LOOSE_BOXES)
