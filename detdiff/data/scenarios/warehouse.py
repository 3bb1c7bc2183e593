"""The warehouse scenario: a ceiling camera looking straight down on a warehouse packing table.

Everything is drawn here with OpenCV and numpy (no downloads): a table surface, six kinds of object
(carton, bottle, can, mailer, tape roll, scanner) with size, rotation, colour and texture varying
within each class, and the difficulties an audit should find, each in a known subset: tiny objects,
crowded groups with occlusion, truncation at the image border, cluttered tables with distractors
(paper, cables, printed labels, tape scraps, pens), blur and dim light. Label faults are then planted
in the *written* COCO file (wrong class, missing box, loose box, duplicate box) while ``truth.json``
keeps the clean version, so an audit's findings can be scored. ``demo/README.md`` documents the
scene and the truth file.

Same seed, same bytes: images, annotations and truth come from numpy ``Generator`` streams spawned
from one ``SeedSequence`` (one stream per image, one for ids, one for faults; see
:mod:`detdiff.data.scenarios.faults`), JPEG quality is fixed and JSON keys are sorted.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any, Callable

import cv2
import numpy as np

from detdiff.data.scenarios.drawing import (
    Op, Scene, cast_shadow, draw, jitter_colour, light_and_lens, object_record, place_object, rect, rotate,
    rounded_rect, settle_visibility, shade)
from detdiff.data.scenarios.faults import DemoPaths, check_fault_rates, draw_images, write_dataset

SCENARIO = "warehouse packing table seen from a ceiling camera looking straight down"

#: (COCO id, name, supercategory). Ids are deliberately not contiguous and do not start at 0 or 1.
CATEGORIES: tuple[tuple[int, str, str], ...] = (
    (3, "carton", "parcel"),
    (7, "bottle", "container"),
    (11, "can", "container"),
    (12, "mailer", "parcel"),
    (20, "tape_roll", "supply"),
    (31, "scanner", "equipment"),
)
#: How often each class is drawn (same order as CATEGORIES): an imbalance an audit can report.
CLASS_WEIGHTS = np.array([0.24, 0.18, 0.18, 0.16, 0.14, 0.10])
#: Plausible confusions used for planted wrong-class labels: things of similar outline.
CONFUSIONS: dict[str, tuple[str, ...]] = {
    "carton": ("mailer",),
    "mailer": ("carton",),
    "bottle": ("can",),
    "can": ("bottle", "tape_roll"),
    "tape_roll": ("can",),
    "scanner": ("carton",),
}

#: Share of images with each condition (drawn independently per image).
IMAGE_CONDITION_RATES: dict[str, float] = {"blur": 0.12, "dim": 0.12, "clutter": 0.3, "crowded": 0.25}
TINY_RATE = 0.12            # share of objects drawn tiny (longest side 9-16 px at 240 px image height)
TRUNCATED_RATE = 0.12       # share of free-standing objects placed across the image border
FREE_MIN_VISIBLE = 0.9      # a free-standing object keeps at least this share of its in-image pixels visible
GROUP_MIN_VISIBLE = 0.35    # an object in a crowded group keeps at least this share visible
PLACEMENT_TRIES = 30
JPEG_QUALITY = 90


# --------------------------------------------------------------------------------------------------
# Objects and distractors: each a list of drawing operations in its own frame.


def _carton(rng: np.random.Generator, size: float) -> list[Op]:
    """Kraft carton from above: brown box, darker edges, flap seam under a lighter tape stripe."""
    w, h = size, size / rng.uniform(1.0, 1.6)
    body = jitter_colour(rng, (70, 122, 168), 8)
    ops = [Op("poly", rect(w, h), shade(body, 1.0)),
           Op("line", np.vstack([rect(w, h), rect(w, h)[:1]]), shade(body, 0.65), 1, inner=True),
           Op("line", np.array([[-w / 2, 0.0], [w / 2, 0.0]]), shade(body, 0.55), 1, inner=True)]
    tape = shade(jitter_colour(rng, (150, 185, 205), 6, (0.95, 1.05)), 1.0)
    ops.append(Op("poly", rect(w, max(2.0, h * rng.uniform(0.16, 0.24))), tape, inner=True))
    if rng.random() < 0.3:                                   # cross taped
        ops.append(Op("poly", rect(max(2.0, w * 0.16), h), tape, inner=True))
    if rng.random() < 0.4 and size > 24:                     # shipping label in a corner
        lw, lh = w * 0.3, h * 0.25
        ops.append(Op("poly", rect(lw, lh, -w / 2 + lw * 0.7, h / 2 - lh * 0.8), (238, 240, 240), inner=True))
    return ops


def _bottle(rng: np.random.Generator, size: float) -> list[Op]:
    """Shrink-wrapped bottle from above: translucent tinted disc, shoulder ring, coloured ridged cap."""
    r = size / 2
    tints = ((200, 165, 110), (120, 175, 105), (205, 200, 185))           # blue, green, clear (BGR)
    body = jitter_colour(rng, tints[rng.integers(len(tints))], 8)
    caps = ((40, 40, 200), (190, 90, 30), (235, 235, 235), (40, 150, 40), (30, 130, 235))
    cap = jitter_colour(rng, caps[rng.integers(len(caps))], 10, (0.9, 1.1))
    glint_angle = rng.uniform(0, 2 * math.pi)
    arc = glint_angle + np.linspace(-0.6, 0.6, 6)
    ops = [Op("circle", np.zeros((1, 2)), shade(body, 1.0), radius=r),
           Op("circle", np.zeros((1, 2)), shade(body, 1.18, 8), 1, radius=r * 0.7, inner=True),
           Op("line", 0.86 * r * np.stack([np.cos(arc), np.sin(arc)], 1), shade(body, 1.3, 30), 1, inner=True),
           Op("circle", np.zeros((1, 2)), shade(cap, 1.0), radius=r * 0.34, inner=True),
           Op("circle", np.zeros((1, 2)), shade(cap, 0.6), 1, radius=r * 0.34, inner=True),
           Op("circle", 0.5 * r * np.array([[math.cos(glint_angle), math.sin(glint_angle)]]),
               (250, 250, 250), radius=max(0.6, r * 0.1), inner=True)]
    return ops


def _can(rng: np.random.Generator, size: float) -> list[Op]:
    """Tin can top: silver disc with a dark rim groove, an inner ring and a pull tab with its rivet."""
    r = size / 2
    metal = jitter_colour(rng, (182, 180, 176), 3)
    tab_dir = rng.uniform(0, 2 * math.pi)
    tab = rounded_rect(r * 0.55, r * 0.24, r * 0.1) + [r * 0.2, 0.0]
    rot = np.array([[math.cos(tab_dir), -math.sin(tab_dir)], [math.sin(tab_dir), math.cos(tab_dir)]])
    return [Op("circle", np.zeros((1, 2)), shade(metal, 1.0), radius=r),
            Op("circle", np.zeros((1, 2)), shade(metal, 0.55), max(1, round(r * 0.1)), radius=r * 0.88,
                inner=True),
            Op("circle", np.zeros((1, 2)), shade(metal, 1.15, 10), 1, radius=r * 0.74, inner=True),
            Op("poly", tab @ rot.T, shade(metal, 0.8), inner=True),
            Op("circle", np.zeros((1, 2)), shade(metal, 0.5), radius=max(0.6, r * 0.08), inner=True)]


def _mailer(rng: np.random.Generator, size: float) -> list[Op]:
    """Padded mailer pouch: yellow or gold envelope with a bubble texture and a sealed flap band."""
    w, h = size, size / rng.uniform(1.3, 1.8)
    tones = ((70, 200, 232), (85, 170, 210))
    body = jitter_colour(rng, tones[rng.integers(len(tones))], 8)
    spacing = max(2.5, w / rng.uniform(8, 12))
    gx = np.arange(-w / 2 + spacing / 2, w * 0.32, spacing)
    gy = np.arange(-h / 2 + spacing / 2, h / 2, spacing)
    bubbles = np.stack(np.meshgrid(gx, gy), -1).reshape(-1, 2)
    flap_w = w * 0.15
    return [Op("poly", rounded_rect(w, h, h * 0.08), shade(body, 1.0)),
            Op("dots", bubbles, shade(body, 1.12, 6), radius=spacing * 0.28, inner=True),
            Op("poly", rect(flap_w, h * 0.96, w / 2 - flap_w / 2 - w * 0.02), shade(body, 0.8), inner=True),
            Op("line", np.array([[w / 2 - flap_w - w * 0.02, -h * 0.45], [w / 2 - flap_w - w * 0.02, h * 0.45]]),
                shade(body, 0.6), 1, inner=True)]


def _tape_roll(rng: np.random.Generator, size: float) -> list[Op]:
    """Roll of packing tape: a ring of tape round a cardboard core, the table showing through the hole."""
    r = size / 2
    ri = r * rng.uniform(0.5, 0.62)
    tones = ((95, 150, 200), (45, 95, 150), (200, 200, 192))
    tape = jitter_colour(rng, tones[rng.integers(len(tones))], 4)
    core_t = max(1.0, r * 0.12)
    end = rng.uniform(0, 2 * math.pi)
    tangent = np.array([-math.sin(end), math.cos(end)])
    radial = np.array([math.cos(end), math.sin(end)])
    tail = np.array([radial * r * 0.96, radial * r * 0.96 + tangent * r * 0.45,
                     radial * r * 0.7 + tangent * r * 0.45, radial * r * 0.7])
    return [Op("circle", np.zeros((1, 2)), shade(tape, 1.0), max(1, round(r - ri)), radius=(r + ri) / 2),
            Op("circle", np.zeros((1, 2)), (70, 110, 150), max(1, round(core_t)), radius=ri + core_t / 2),
            Op("circle", np.zeros((1, 2)), shade(tape, 0.85), 1, radius=(r + ri) / 2 + (r - ri) * 0.15,
                inner=True),
            Op("poly", tail, shade(tape, 1.08))]


def _scanner(rng: np.random.Generator, size: float) -> list[Op]:
    """Handheld barcode scanner from above: dark head and handle, red exit window, coloured trigger band."""
    L = size
    shell = jitter_colour(rng, (48, 46, 44), 6, (0.8, 1.2))
    accents = ((30, 190, 235), (30, 120, 230), (150, 150, 150))
    accent = jitter_colour(rng, accents[rng.integers(len(accents))], 8, (0.9, 1.1))
    head_w, handle_w = L * rng.uniform(0.38, 0.46), L * rng.uniform(0.18, 0.23)
    return [Op("poly", rounded_rect(L * 0.62, handle_w, handle_w * 0.45, -L * 0.19), shade(shell, 1.0)),
            Op("poly", rounded_rect(L * 0.4, head_w, L * 0.08, L * 0.3), shade(shell, 1.1)),
            Op("poly", rect(L * 0.045, head_w * 0.8, L * 0.47), (40, 40, 205), inner=True),
            Op("poly", rect(L * 0.08, handle_w * 0.9, L * 0.03), shade(accent, 1.0), inner=True),
            Op("line", np.array([[-L * 0.45, 0.0], [-L * 0.12, 0.0]]), shade(shell, 1.5, 10), 1, inner=True)]


#: Builder and longest side in px (at 240 px image height) per class, same order as CATEGORIES.
_BUILDERS: tuple[tuple[Callable[[np.random.Generator, float], list[Op]], tuple[float, float]], ...] = (
    (_carton, (34, 62)), (_bottle, (26, 44)), (_can, (24, 40)), (_mailer, (38, 66)),
    (_tape_roll, (28, 46)), (_scanner, (40, 64)))
_TINY_SIDE = (9.0, 16.0)


def _paper(rng: np.random.Generator, u: float) -> list[Op]:
    w, h = rng.uniform(45, 100) * u, rng.uniform(35, 80) * u
    ys = np.linspace(-h * 0.35, h * 0.35, int(rng.integers(4, 10)))
    ink = float(rng.uniform(100, 150))
    ops = [Op("poly", rect(w, h), shade(jitter_colour(rng, (236, 236, 232), 4, (0.95, 1.05)), 1.0))]
    for y in ys:
        x2 = w * rng.uniform(0.0, 0.4)
        ops.append(Op("line", np.array([[-w * 0.4, y], [x2, y]]), (ink, ink, ink), 1, inner=True))
    return ops


def _cable(rng: np.random.Generator, u: float) -> list[Op]:
    steps = int(rng.integers(10, 20))
    heading = rng.uniform(0, 2 * math.pi) + np.cumsum(rng.normal(0, 0.35, steps))
    seg = rng.uniform(10, 18, steps) * u
    pts = np.vstack([[0.0, 0.0], np.cumsum(np.stack([np.cos(heading), np.sin(heading)], 1) * seg[:, None], 0)])
    pts -= pts.mean(0)
    tones = ((25, 25, 25), (60, 60, 60), (140, 80, 30), (220, 220, 220))
    return [Op("line", pts, shade(np.asarray(tones[rng.integers(len(tones))], float), 1.0),
                int(max(1, round(rng.uniform(2, 4) * u))))]


def _printed_label(rng: np.random.Generator, u: float) -> list[Op]:
    w, h = rng.uniform(16, 28) * u, rng.uniform(10, 18) * u
    xs = np.sort(rng.uniform(-w * 0.4, w * 0.4, int(rng.integers(8, 15))))
    ops = [Op("poly", rect(w, h), (244, 244, 244))]
    ops += [Op("line", np.array([[x, -h * 0.3], [x, h * 0.3]]), (20, 20, 20), 1, inner=True) for x in xs]
    return ops


def _tape_scrap(rng: np.random.Generator, u: float) -> list[Op]:
    colour = shade(jitter_colour(rng, (150, 185, 205), 8), 1.0)
    return [Op("poly", rect(rng.uniform(20, 45) * u, rng.uniform(4, 7) * u), colour)]


def _pen(rng: np.random.Generator, u: float) -> list[Op]:
    length, t = rng.uniform(30, 45) * u, max(2.0, 3 * u)
    barrel = ((160, 60, 20), (30, 30, 30), (40, 40, 190))[rng.integers(3)]
    return [Op("poly", rounded_rect(length, t, t / 2), barrel),
            Op("poly", rect(length * 0.25, t * 1.2, -length * 0.35), (210, 210, 210))]


_DISTRACTORS = (_paper, _cable, _printed_label, _tape_scrap, _pen)


# --------------------------------------------------------------------------------------------------
# Layout and rendering: table, distractors, shadows, objects, light, blur, noise.


def _place(rng: np.random.Generator, scene: Scene, category: int, *, tiny: bool, truncate: bool,
           group_centre: tuple[float, float] | None, u: float) -> None:
    """Build one object of ``category`` at a random size and rotation and try to place it."""
    builder, (lo, hi) = _BUILDERS[category]
    size = rng.uniform(*_TINY_SIDE) * u if tiny else rng.uniform(lo, hi) * u
    ops = rotate(builder(rng, size), rng.uniform(0, 2 * math.pi))
    min_visible = GROUP_MIN_VISIBLE if group_centre is not None else FREE_MIN_VISIBLE
    place_object(rng, scene, category, ops, tiny=tiny, truncate=truncate, group_centre=group_centre,
                 spread=0.45 * size + 4 * u, min_visible=min_visible, tries=PLACEMENT_TRIES, u=u)


def _layout(rng: np.random.Generator, width: int, height: int) -> Scene:
    """Image conditions and object positions for one image."""
    conditions = {k: bool(rng.random() < p) for k, p in IMAGE_CONDITION_RATES.items()}
    scene = Scene(width, height, conditions, owner=np.full((height, width), -1, dtype=np.int16))
    u = min(width, height) / 240.0
    plan: list[tuple[bool, tuple[float, float] | None]] = []      # (truncate, group centre)
    if conditions["crowded"]:
        group = (rng.uniform(0.3, 0.7) * width, rng.uniform(0.3, 0.7) * height)
        plan += [(False, group)] * int(rng.integers(4, 8))
        plan += [(bool(rng.random() < TRUNCATED_RATE), None) for _ in range(int(rng.integers(0, 3)))]
    else:
        plan += [(bool(rng.random() < TRUNCATED_RATE), None) for _ in range(int(rng.integers(2, 7)))]
    for truncate, group in plan:
        category = int(rng.choice(len(CATEGORIES), p=CLASS_WEIGHTS))
        tiny = bool(rng.random() < TINY_RATE) and not truncate
        _place(rng, scene, category, tiny=tiny, truncate=truncate, group_centre=group, u=u)
    settle_visibility(scene)
    return scene


def _table(rng: np.random.Generator, width: int, height: int) -> np.ndarray:
    """Table surface ``float32 [H, W, 3]`` BGR: wood laminate, grey work mat or brushed steel."""
    kind = int(rng.integers(3))
    base = (np.array([[150, 188, 212], [98, 102, 100], [172, 170, 165]][kind], dtype=np.float32)
            * np.float32(rng.uniform(0.9, 1.1)))
    blotch = cv2.resize(rng.standard_normal((6, 8), dtype=np.float32), (width, height),
                        interpolation=cv2.INTER_CUBIC) * 6
    if kind == 1:
        streak = rng.standard_normal((height, width), dtype=np.float32) * 3
    else:   # grain or brushing: noise fast along one axis, slow along the other
        grain = cv2.resize(rng.standard_normal((4, width), dtype=np.float32), (width, height),
                           interpolation=cv2.INTER_CUBIC) * (7 if kind == 0 else 4)
        streak = grain if rng.random() < 0.5 else cv2.resize(grain.T, (width, height))
    surface = base[None, None, :] + (blotch + streak)[:, :, None]
    if kind == 1:   # faint printed grid on the mat
        step = int(rng.integers(36, 48))
        surface[::step] *= 0.85
        surface[:, ::step] *= 0.85
    return surface


def _render(rng: np.random.Generator, scene: Scene) -> tuple[np.ndarray, dict[str, float]]:
    """Pixels ``uint8 [H, W, 3]`` BGR of a laid-out scene, and the strength of each image condition."""
    W, H = scene.width, scene.height
    u = min(W, H) / 240.0
    image = np.clip(_table(rng, W, H), 0, 255).astype(np.uint8)
    if scene.conditions["clutter"]:
        for _ in range(int(rng.integers(3, 8))):
            ops = rotate(_DISTRACTORS[rng.integers(len(_DISTRACTORS))](rng, u), rng.uniform(0, 2 * math.pi))
            draw(image, ops, (int(rng.integers(0, W)), int(rng.integers(0, H))))
    image = cast_shadow(image, scene.owner, u)
    for obj in scene.objects:
        draw(image, obj.ops, obj.centre)
    return light_and_lens(rng, image, dim=scene.conditions["dim"], blur=scene.conditions["blur"], u=u)


def generate(out_dir: str | Path, *, num_images: int = 300, seed: int = 0, width: int = 320,
             height: int = 240, fault_rates: dict[str, float] | None = None,
             progress: bool = True) -> DemoPaths:
    """Draw the packing-table scenario and write it as a COCO dataset with planted label faults.

    Parameters
    ----------
    out_dir : folder to write ``annotations.json`` (COCO, faults included), ``images/*.jpg`` and
        ``truth.json`` (clean objects, image conditions, planted faults; see ``demo/README.md``).
    num_images : how many images to draw.
    seed : everything (pixels, ids, faults) follows from it; the same seed writes the same bytes.
    width, height : image size in pixels; object sizes scale with ``min(width, height) / 240``.
    fault_rates : share of objects for each fault kind, keys among ``wrong_class``, ``missing_box``,
        ``loose_box``, ``duplicate_box``; missing keys keep
        :data:`~detdiff.data.scenarios.faults.DEFAULT_FAULT_RATES`.
    progress : show a tqdm bar while drawing.

    Returns
    -------
    DemoPaths with the three paths written.
    """
    if num_images < 1:
        raise ValueError(f"generate_demo: num_images must be at least 1, got {num_images}")
    if min(width, height) < 96:
        raise ValueError(f"generate_demo: images must be at least 96 x 96 px, got {width} x {height}")
    rates = check_fault_rates(fault_rates)

    def draw_table(rng: np.random.Generator, image_id: int) -> tuple[np.ndarray, dict[str, Any], list[dict[str, Any]]]:
        scene = _layout(rng, width, height)
        pixels, strength = _render(rng, scene)
        record = {"width": width, "height": height, **scene.conditions, **strength}
        return pixels, record, [object_record(obj, image_id) for obj in scene.objects]

    streams, images, objects = draw_images(Path(out_dir), num_images=num_images, seed=seed, stem="table",
                                           quality=JPEG_QUALITY, progress=progress, draw=draw_table)
    return write_dataset(out_dir, scenario=SCENARIO, seed=seed, streams=streams, categories=CATEGORIES,
                         confusions=CONFUSIONS, images=images, objects=objects, rates=rates)
