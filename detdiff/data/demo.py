"""The demo scenario: a ceiling camera looking straight down on a warehouse packing table.

Everything is drawn here with OpenCV and numpy (no downloads): a table surface, six kinds of object
(carton, bottle, can, mailer, tape roll, scanner) with size, rotation, colour and texture varying
within each class, and the difficulties an audit should find, each in a known subset: tiny objects,
crowded groups with occlusion, truncation at the image border, cluttered tables with distractors
(paper, cables, printed labels, tape scraps, pens), blur and dim light. Label faults are then planted
in the *written* COCO file (wrong class, missing box, loose box, duplicate box) while ``truth.json``
keeps the clean version, so an audit's findings can be scored. ``demo/README.md`` documents the
scene and the truth file.

Same seed, same bytes: images, annotations and truth come from numpy ``Generator`` streams spawned
from one ``SeedSequence`` (one stream per image, one for ids, one for faults), JPEG quality is fixed
and JSON keys are sorted.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import cv2
import numpy as np
from tqdm import tqdm

from detdiff.atomic import write_json_atomic

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

#: Share of clean objects that receive each planted fault (disjoint sets of objects).
DEFAULT_FAULT_RATES: dict[str, float] = {
    "wrong_class": 0.04, "missing_box": 0.03, "loose_box": 0.04, "duplicate_box": 0.02}
#: IoU between a planted loose box and its clean box lies in this range.
LOOSE_BOX_IOU: tuple[float, float] = (0.5, 0.7)
#: IoU between a planted duplicate and its original is above this (above lint's near-duplicate threshold 0.95,
#: so `detdiff check` reports every planted duplicate).
DUPLICATE_MIN_IOU = 0.95

#: Share of images with each condition (drawn independently per image).
IMAGE_CONDITION_RATES: dict[str, float] = {"blur": 0.12, "dim": 0.12, "clutter": 0.3, "crowded": 0.25}
TINY_RATE = 0.12            # share of objects drawn tiny (longest side 9-16 px at 240 px image height)
TRUNCATED_RATE = 0.12       # share of free-standing objects placed across the image border
FREE_MIN_VISIBLE = 0.9      # a free-standing object keeps at least this share of its in-image pixels visible
GROUP_MIN_VISIBLE = 0.35    # an object in a crowded group keeps at least this share visible
PLACEMENT_TRIES = 30
JPEG_QUALITY = 90
SHIFT = 2                   # cv2 drawing at 1/4 px precision (coordinates are multiplied by 2**SHIFT)

@dataclass(frozen=True)
class DemoPaths:
    """Where :func:`generate_demo` wrote the scenario."""

    annotations: Path   # COCO file with the planted faults
    images_dir: Path    # JPEG images, file names as in the COCO file
    truth: Path         # clean objects, image conditions and the list of planted faults


# --------------------------------------------------------------------------------------------------
# Shapes: a thing is a list of drawing operations in its own frame (origin at its centre, x to the right).


@dataclass
class _Op:
    """One cv2 drawing call in object-local coordinates (float px).

    kind: ``poly`` (filled polygon through ``points [n, 2]``), ``line`` (open polyline, ``thickness``),
    ``circle`` (centre ``points [1, 2]``, ``radius``; ``thickness`` -1 = filled, else a ring),
    ``dots`` (filled circles of ``radius`` at ``points [k, 2]``). ``inner`` ops lie inside the
    silhouette drawn by the others (texture, print) and are skipped when drawing the object's mask.
    """

    kind: str
    points: np.ndarray
    colour: tuple[float, float, float]
    thickness: int = -1
    radius: float = 0.0
    inner: bool = False


def _rect(w: float, h: float, cx: float = 0.0, cy: float = 0.0) -> np.ndarray:
    """Corners ``[4, 2]`` of an axis-aligned w x h rectangle centred on (cx, cy)."""
    return np.array([[-w / 2, -h / 2], [w / 2, -h / 2], [w / 2, h / 2], [-w / 2, h / 2]]) + [cx, cy]


def _rounded_rect(w: float, h: float, r: float, cx: float = 0.0, cy: float = 0.0, n: int = 4) -> np.ndarray:
    """Polygon ``[4 * (n + 1), 2]`` of a w x h rectangle with corner radius r, centred on (cx, cy)."""
    r = min(r, w / 2, h / 2)
    centres = np.array([[w / 2 - r, -h / 2 + r], [w / 2 - r, h / 2 - r], [-w / 2 + r, h / 2 - r],
                        [-w / 2 + r, -h / 2 + r]])
    start = np.array([-0.5, 0.0, 0.5, 1.0]) * math.pi                      # one quarter arc per corner
    angles = start[:, None] + np.linspace(0, math.pi / 2, n + 1)[None, :]  # [4, n + 1]
    arcs = centres[:, None, :] + r * np.stack([np.cos(angles), np.sin(angles)], axis=-1)
    return arcs.reshape(-1, 2) + [cx, cy]


def _jitter_colour(rng: np.random.Generator, bgr: tuple[float, float, float], spread: float = 10.0,
                   brightness: tuple[float, float] = (0.85, 1.15)) -> np.ndarray:
    """A within-class variant of a BGR colour: overall brightness scale plus per-channel noise."""
    c = np.asarray(bgr, dtype=np.float64) * rng.uniform(*brightness) + rng.normal(0.0, spread, 3)
    return np.clip(c, 0, 255)


def _shade(colour: np.ndarray, factor: float, add: float = 0.0) -> tuple[float, float, float]:
    return tuple(float(v) for v in np.clip(np.asarray(colour) * factor + add, 0, 255))


def _carton(rng: np.random.Generator, size: float) -> list[_Op]:
    """Kraft carton from above: brown box, darker edges, flap seam under a lighter tape stripe."""
    w, h = size, size / rng.uniform(1.0, 1.6)
    body = _jitter_colour(rng, (70, 122, 168), 8)
    ops = [_Op("poly", _rect(w, h), _shade(body, 1.0)),
           _Op("line", np.vstack([_rect(w, h), _rect(w, h)[:1]]), _shade(body, 0.65), 1, inner=True),
           _Op("line", np.array([[-w / 2, 0.0], [w / 2, 0.0]]), _shade(body, 0.55), 1, inner=True)]
    tape = _shade(_jitter_colour(rng, (150, 185, 205), 6, (0.95, 1.05)), 1.0)
    ops.append(_Op("poly", _rect(w, max(2.0, h * rng.uniform(0.16, 0.24))), tape, inner=True))
    if rng.random() < 0.3:                                   # cross taped
        ops.append(_Op("poly", _rect(max(2.0, w * 0.16), h), tape, inner=True))
    if rng.random() < 0.4 and size > 24:                     # shipping label in a corner
        lw, lh = w * 0.3, h * 0.25
        ops.append(_Op("poly", _rect(lw, lh, -w / 2 + lw * 0.7, h / 2 - lh * 0.8), (238, 240, 240), inner=True))
    return ops


def _bottle(rng: np.random.Generator, size: float) -> list[_Op]:
    """Shrink-wrapped bottle from above: translucent tinted disc, shoulder ring, coloured ridged cap."""
    r = size / 2
    tints = ((200, 165, 110), (120, 175, 105), (205, 200, 185))           # blue, green, clear (BGR)
    body = _jitter_colour(rng, tints[rng.integers(len(tints))], 8)
    caps = ((40, 40, 200), (190, 90, 30), (235, 235, 235), (40, 150, 40), (30, 130, 235))
    cap = _jitter_colour(rng, caps[rng.integers(len(caps))], 10, (0.9, 1.1))
    glint_angle = rng.uniform(0, 2 * math.pi)
    arc = glint_angle + np.linspace(-0.6, 0.6, 6)
    ops = [_Op("circle", np.zeros((1, 2)), _shade(body, 1.0), radius=r),
           _Op("circle", np.zeros((1, 2)), _shade(body, 1.18, 8), 1, radius=r * 0.7, inner=True),
           _Op("line", 0.86 * r * np.stack([np.cos(arc), np.sin(arc)], 1), _shade(body, 1.3, 30), 1, inner=True),
           _Op("circle", np.zeros((1, 2)), _shade(cap, 1.0), radius=r * 0.34, inner=True),
           _Op("circle", np.zeros((1, 2)), _shade(cap, 0.6), 1, radius=r * 0.34, inner=True),
           _Op("circle", 0.5 * r * np.array([[math.cos(glint_angle), math.sin(glint_angle)]]),
               (250, 250, 250), radius=max(0.6, r * 0.1), inner=True)]
    return ops


def _can(rng: np.random.Generator, size: float) -> list[_Op]:
    """Tin can top: silver disc with a dark rim groove, an inner ring and a pull tab with its rivet."""
    r = size / 2
    metal = _jitter_colour(rng, (182, 180, 176), 3)
    tab_dir = rng.uniform(0, 2 * math.pi)
    tab = _rounded_rect(r * 0.55, r * 0.24, r * 0.1) + [r * 0.2, 0.0]
    rot = np.array([[math.cos(tab_dir), -math.sin(tab_dir)], [math.sin(tab_dir), math.cos(tab_dir)]])
    return [_Op("circle", np.zeros((1, 2)), _shade(metal, 1.0), radius=r),
            _Op("circle", np.zeros((1, 2)), _shade(metal, 0.55), max(1, round(r * 0.1)), radius=r * 0.88,
                inner=True),
            _Op("circle", np.zeros((1, 2)), _shade(metal, 1.15, 10), 1, radius=r * 0.74, inner=True),
            _Op("poly", tab @ rot.T, _shade(metal, 0.8), inner=True),
            _Op("circle", np.zeros((1, 2)), _shade(metal, 0.5), radius=max(0.6, r * 0.08), inner=True)]


def _mailer(rng: np.random.Generator, size: float) -> list[_Op]:
    """Padded mailer pouch: yellow or gold envelope with a bubble texture and a sealed flap band."""
    w, h = size, size / rng.uniform(1.3, 1.8)
    tones = ((70, 200, 232), (85, 170, 210))
    body = _jitter_colour(rng, tones[rng.integers(len(tones))], 8)
    spacing = max(2.5, w / rng.uniform(8, 12))
    gx = np.arange(-w / 2 + spacing / 2, w * 0.32, spacing)
    gy = np.arange(-h / 2 + spacing / 2, h / 2, spacing)
    bubbles = np.stack(np.meshgrid(gx, gy), -1).reshape(-1, 2)
    flap_w = w * 0.15
    return [_Op("poly", _rounded_rect(w, h, h * 0.08), _shade(body, 1.0)),
            _Op("dots", bubbles, _shade(body, 1.12, 6), radius=spacing * 0.28, inner=True),
            _Op("poly", _rect(flap_w, h * 0.96, w / 2 - flap_w / 2 - w * 0.02), _shade(body, 0.8), inner=True),
            _Op("line", np.array([[w / 2 - flap_w - w * 0.02, -h * 0.45], [w / 2 - flap_w - w * 0.02, h * 0.45]]),
                _shade(body, 0.6), 1, inner=True)]


def _tape_roll(rng: np.random.Generator, size: float) -> list[_Op]:
    """Roll of packing tape: a ring of tape round a cardboard core, the table showing through the hole."""
    r = size / 2
    ri = r * rng.uniform(0.5, 0.62)
    tones = ((95, 150, 200), (45, 95, 150), (200, 200, 192))
    tape = _jitter_colour(rng, tones[rng.integers(len(tones))], 4)
    core_t = max(1.0, r * 0.12)
    end = rng.uniform(0, 2 * math.pi)
    tangent = np.array([-math.sin(end), math.cos(end)])
    radial = np.array([math.cos(end), math.sin(end)])
    tail = np.array([radial * r * 0.96, radial * r * 0.96 + tangent * r * 0.45,
                     radial * r * 0.7 + tangent * r * 0.45, radial * r * 0.7])
    return [_Op("circle", np.zeros((1, 2)), _shade(tape, 1.0), max(1, round(r - ri)), radius=(r + ri) / 2),
            _Op("circle", np.zeros((1, 2)), (70, 110, 150), max(1, round(core_t)), radius=ri + core_t / 2),
            _Op("circle", np.zeros((1, 2)), _shade(tape, 0.85), 1, radius=(r + ri) / 2 + (r - ri) * 0.15,
                inner=True),
            _Op("poly", tail, _shade(tape, 1.08))]


def _scanner(rng: np.random.Generator, size: float) -> list[_Op]:
    """Handheld barcode scanner from above: dark head and handle, red exit window, coloured trigger band."""
    L = size
    shell = _jitter_colour(rng, (48, 46, 44), 6, (0.8, 1.2))
    accents = ((30, 190, 235), (30, 120, 230), (150, 150, 150))
    accent = _jitter_colour(rng, accents[rng.integers(len(accents))], 8, (0.9, 1.1))
    head_w, handle_w = L * rng.uniform(0.38, 0.46), L * rng.uniform(0.18, 0.23)
    return [_Op("poly", _rounded_rect(L * 0.62, handle_w, handle_w * 0.45, -L * 0.19), _shade(shell, 1.0)),
            _Op("poly", _rounded_rect(L * 0.4, head_w, L * 0.08, L * 0.3), _shade(shell, 1.1)),
            _Op("poly", _rect(L * 0.045, head_w * 0.8, L * 0.47), (40, 40, 205), inner=True),
            _Op("poly", _rect(L * 0.08, handle_w * 0.9, L * 0.03), _shade(accent, 1.0), inner=True),
            _Op("line", np.array([[-L * 0.45, 0.0], [-L * 0.12, 0.0]]), _shade(shell, 1.5, 10), 1, inner=True)]


#: Builder and longest side in px (at 240 px image height) per class, same order as CATEGORIES.
_BUILDERS: tuple[tuple[Callable[[np.random.Generator, float], list[_Op]], tuple[float, float]], ...] = (
    (_carton, (34, 62)), (_bottle, (26, 44)), (_can, (24, 40)), (_mailer, (38, 66)),
    (_tape_roll, (28, 46)), (_scanner, (40, 64)))
_TINY_SIDE = (9.0, 16.0)


def _paper(rng: np.random.Generator, u: float) -> list[_Op]:
    w, h = rng.uniform(45, 100) * u, rng.uniform(35, 80) * u
    ys = np.linspace(-h * 0.35, h * 0.35, int(rng.integers(4, 10)))
    ink = float(rng.uniform(100, 150))
    ops = [_Op("poly", _rect(w, h), _shade(_jitter_colour(rng, (236, 236, 232), 4, (0.95, 1.05)), 1.0))]
    for y in ys:
        x2 = w * rng.uniform(0.0, 0.4)
        ops.append(_Op("line", np.array([[-w * 0.4, y], [x2, y]]), (ink, ink, ink), 1, inner=True))
    return ops


def _cable(rng: np.random.Generator, u: float) -> list[_Op]:
    steps = int(rng.integers(10, 20))
    heading = rng.uniform(0, 2 * math.pi) + np.cumsum(rng.normal(0, 0.35, steps))
    seg = rng.uniform(10, 18, steps) * u
    pts = np.vstack([[0.0, 0.0], np.cumsum(np.stack([np.cos(heading), np.sin(heading)], 1) * seg[:, None], 0)])
    pts -= pts.mean(0)
    tones = ((25, 25, 25), (60, 60, 60), (140, 80, 30), (220, 220, 220))
    return [_Op("line", pts, _shade(np.asarray(tones[rng.integers(len(tones))], float), 1.0),
                int(max(1, round(rng.uniform(2, 4) * u))))]


def _printed_label(rng: np.random.Generator, u: float) -> list[_Op]:
    w, h = rng.uniform(16, 28) * u, rng.uniform(10, 18) * u
    xs = np.sort(rng.uniform(-w * 0.4, w * 0.4, int(rng.integers(8, 15))))
    ops = [_Op("poly", _rect(w, h), (244, 244, 244))]
    ops += [_Op("line", np.array([[x, -h * 0.3], [x, h * 0.3]]), (20, 20, 20), 1, inner=True) for x in xs]
    return ops


def _tape_scrap(rng: np.random.Generator, u: float) -> list[_Op]:
    colour = _shade(_jitter_colour(rng, (150, 185, 205), 8), 1.0)
    return [_Op("poly", _rect(rng.uniform(20, 45) * u, rng.uniform(4, 7) * u), colour)]


def _pen(rng: np.random.Generator, u: float) -> list[_Op]:
    length, t = rng.uniform(30, 45) * u, max(2.0, 3 * u)
    barrel = ((160, 60, 20), (30, 30, 30), (40, 40, 190))[rng.integers(3)]
    return [_Op("poly", _rounded_rect(length, t, t / 2), barrel),
            _Op("poly", _rect(length * 0.25, t * 1.2, -length * 0.35), (210, 210, 210))]


_DISTRACTORS = (_paper, _cable, _printed_label, _tape_scrap, _pen)


def _rotate(ops: list[_Op], angle: float) -> list[_Op]:
    """The same ops rotated by ``angle`` radians about the object's centre."""
    c, s = math.cos(angle), math.sin(angle)
    rot = np.array([[c, -s], [s, c]])
    return [_Op(op.kind, op.points @ rot.T, op.colour, op.thickness, op.radius, op.inner) for op in ops]


def _extent(ops: list[_Op]) -> float:
    """Radius of a disc about the origin holding every drawn pixel."""
    reach = 0.0
    for op in ops:
        pad = (op.thickness / 2 if op.thickness > 0 else 0.0) + op.radius
        reach = max(reach, float(np.linalg.norm(op.points, axis=1).max()) + pad)
    return reach + 1.0


def _draw(canvas: np.ndarray, ops: list[_Op], centre: tuple[int, int], *, mask: bool = False) -> None:
    """Draw ``ops`` onto ``canvas`` with the object's origin at integer pixel ``centre`` (x, y).

    ``mask=True`` draws the silhouette only (value 255, no antialiasing, ``inner`` ops skipped), so an
    object's mask and its drawing cover the same pixels whatever the centre.
    """
    scale = 1 << SHIFT
    line_type = cv2.LINE_8 if mask else cv2.LINE_AA
    for op in ops:
        if mask and op.inner:
            continue
        colour = 255 if mask else op.colour
        pts = np.rint((op.points + centre) * scale).astype(np.int32)
        if op.kind == "poly":
            cv2.fillPoly(canvas, [pts], colour, line_type, SHIFT)
        elif op.kind == "line":
            cv2.polylines(canvas, [pts], False, colour, op.thickness, line_type, SHIFT)
        elif op.kind == "circle":
            radius = max(scale // 2, int(round(op.radius * scale)))
            cv2.circle(canvas, (int(pts[0, 0]), int(pts[0, 1])), radius, colour, op.thickness, line_type, SHIFT)
        elif op.kind == "dots":
            radius = max(scale // 2, int(round(op.radius * scale)))
            for x, y in pts:
                cv2.circle(canvas, (int(x), int(y)), radius, colour, -1, line_type, SHIFT)


# --------------------------------------------------------------------------------------------------
# Layout: where things go, and what is visible of each.


@dataclass
class _Placed:
    category: int               # index into CATEGORIES
    ops: list[_Op]
    centre: tuple[int, int]
    tiny: bool
    in_group: bool
    min_visible: float
    full_pixels: int = 0
    in_pixels: int = 0
    visible_pixels: int = 0
    bbox: tuple[float, float, float, float] = (0.0, 0.0, 0.0, 0.0)


@dataclass
class _Scene:
    width: int
    height: int
    conditions: dict[str, bool]
    objects: list[_Placed] = field(default_factory=list)
    owner: np.ndarray | None = None          # int16 [H, W]: index of the object seen at each pixel, -1 = table


def _local_mask(ops: list[_Op]) -> tuple[np.ndarray, int]:
    """Silhouette ``uint8 [L, L]`` of an object drawn with its origin at pixel (c, c); returns (mask, c)."""
    c = int(math.ceil(_extent(ops))) + 1
    canvas = np.zeros((2 * c + 1, 2 * c + 1), dtype=np.uint8)
    _draw(canvas, ops, (c, c), mask=True)
    return canvas, c


def _clip_window(centre: tuple[int, int], c: int, size: int, width: int, height: int
                 ) -> tuple[slice, slice, slice, slice]:
    """Matching (image rows, image cols, mask rows, mask cols) of a mask of side ``size`` at ``centre``."""
    x0, y0 = centre[0] - c, centre[1] - c
    ix0, iy0 = max(0, x0), max(0, y0)
    ix1, iy1 = min(width, x0 + size), min(height, y0 + size)
    return (slice(iy0, max(iy0, iy1)), slice(ix0, max(ix0, ix1)),
            slice(iy0 - y0, max(iy0, iy1) - y0), slice(ix0 - x0, max(ix0, ix1) - x0))


def _place_object(rng: np.random.Generator, scene: _Scene, category: int, *, tiny: bool, truncate: bool,
                  group_centre: tuple[float, float] | None, u: float) -> None:
    """Try a few positions for a new object; keep the first that leaves everything visible enough."""
    builder, (lo, hi) = _BUILDERS[category]
    size = rng.uniform(*_TINY_SIDE) * u if tiny else rng.uniform(lo, hi) * u
    ops = _rotate(builder(rng, size), rng.uniform(0, 2 * math.pi))
    mask, c = _local_mask(ops)
    silhouette = mask > 0
    full = int(silhouette.sum())
    W, H = scene.width, scene.height
    if 2 * c + 2 >= min(W, H):
        return
    in_group = group_centre is not None
    min_visible = GROUP_MIN_VISIBLE if in_group else FREE_MIN_VISIBLE
    for _ in range(PLACEMENT_TRIES):
        if in_group:
            spread = 0.45 * size + 4 * u
            cx = int(np.clip(round(group_centre[0] + rng.normal(0, spread)), c, W - 1 - c))
            cy = int(np.clip(round(group_centre[1] + rng.normal(0, spread)), c, H - 1 - c))
        elif truncate:
            edge = int(rng.integers(4))                        # left, right, top, bottom
            depth = int(round(rng.uniform(-0.3, 0.45) * c))    # centre distance inside the border
            along = int(rng.integers(c, (H if edge < 2 else W) - c))
            cx, cy = ((depth, along), (W - 1 - depth, along), (along, depth), (along, H - 1 - depth))[edge]
        else:
            cx, cy = int(rng.integers(c, W - c)), int(rng.integers(c, H - c))
        rows, cols, mrows, mcols = _clip_window((cx, cy), c, mask.shape[0], W, H)
        inside = silhouette[mrows, mcols]
        in_pixels = int(inside.sum())
        if in_pixels == 0:
            continue
        if truncate:
            ys, xs = np.nonzero(inside)
            if not (0.35 <= in_pixels / full <= 0.85) or min(np.ptp(xs), np.ptp(ys)) + 1 < 6 * u:
                continue
        owner = scene.owner.copy()
        owner[rows, cols][inside] = len(scene.objects)
        visible = np.bincount(owner.ravel().astype(np.int64) + 1, minlength=len(scene.objects) + 2)[1:]
        if any(visible[j] < obj.min_visible * obj.in_pixels for j, obj in enumerate(scene.objects)):
            continue
        ys, xs = np.nonzero(inside)
        bbox = (float(cols.start + xs.min()), float(rows.start + ys.min()),
                float(xs.max() - xs.min() + 1), float(ys.max() - ys.min() + 1))
        scene.owner = owner
        scene.objects.append(_Placed(category, ops, (cx, cy), tiny, in_group, min_visible, full, in_pixels,
                                     0, bbox))
        return


def _layout(rng: np.random.Generator, width: int, height: int) -> _Scene:
    """Image conditions and object positions for one image."""
    conditions = {k: bool(rng.random() < p) for k, p in IMAGE_CONDITION_RATES.items()}
    scene = _Scene(width, height, conditions, owner=np.full((height, width), -1, dtype=np.int16))
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
        _place_object(rng, scene, category, tiny=tiny, truncate=truncate, group_centre=group, u=u)
    visible = np.bincount(scene.owner.ravel().astype(np.int64) + 1, minlength=len(scene.objects) + 1)[1:]
    for obj, v in zip(scene.objects, visible):
        obj.visible_pixels = int(v)
    return scene


# --------------------------------------------------------------------------------------------------
# Rendering: table, distractors, shadows, objects, light, blur, noise.


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


def _render(rng: np.random.Generator, scene: _Scene) -> tuple[np.ndarray, dict[str, float]]:
    """Pixels ``uint8 [H, W, 3]`` BGR of a laid-out scene, and the strength of each image condition."""
    W, H = scene.width, scene.height
    u = min(W, H) / 240.0
    image = np.clip(_table(rng, W, H), 0, 255).astype(np.uint8)
    if scene.conditions["clutter"]:
        for _ in range(int(rng.integers(3, 8))):
            ops = _rotate(_DISTRACTORS[rng.integers(len(_DISTRACTORS))](rng, u), rng.uniform(0, 2 * math.pi))
            _draw(image, ops, (int(rng.integers(0, W)), int(rng.integers(0, H))))
    # soft shadows from the ceiling light, cast by the objects down and to the right
    silhouette = (scene.owner >= 0).astype(np.float32)
    dx, dy = max(1, round(2 * u)), max(1, round(3 * u))
    shadow = np.zeros_like(silhouette)
    shadow[dy:, dx:] = silhouette[:-dy, :-dx]
    shadow = cv2.GaussianBlur(shadow, (0, 0), 2.0 * u)
    image = (image * (1.0 - 0.35 * shadow)[:, :, None]).astype(np.uint8)
    for obj in scene.objects:
        _draw(image, obj.ops, obj.centre)
    # light: brighter under the lamp, dim images darker and noisier
    yy, xx = np.mgrid[0:H, 0:W].astype(np.float32)
    lx, ly = rng.uniform(0.3, 0.7) * W, rng.uniform(0.3, 0.7) * H
    gain = 1.08 - 0.35 * (((xx - lx) / W) ** 2 + ((yy - ly) / H) ** 2)
    light = float(rng.uniform(0.28, 0.45)) if scene.conditions["dim"] else 1.0
    pixels = image.astype(np.float32) * (gain * light)[:, :, None]
    blur_sigma = float(rng.uniform(1.4, 2.6) * u) if scene.conditions["blur"] else 0.0
    if blur_sigma:
        pixels = cv2.GaussianBlur(pixels, (0, 0), blur_sigma)
    noise_sigma = float(rng.uniform(7, 11)) if scene.conditions["dim"] else float(rng.uniform(1.5, 3.0))
    pixels += rng.standard_normal(pixels.shape, dtype=np.float32) * noise_sigma
    strength = {"blur_sigma": round(blur_sigma, 3), "light_gain": round(light, 3),
                "noise_sigma": round(noise_sigma, 3)}
    return np.clip(np.rint(pixels), 0, 255).astype(np.uint8), strength


# --------------------------------------------------------------------------------------------------
# Faults planted in the written annotations.


def _iou_xywh(a: np.ndarray, b: np.ndarray) -> float:
    """IoU of two xywh boxes."""
    ix = max(0.0, min(a[0] + a[2], b[0] + b[2]) - max(a[0], b[0]))
    iy = max(0.0, min(a[1] + a[3], b[1] + b[3]) - max(a[1], b[1]))
    inter = ix * iy
    return float(inter / (a[2] * a[3] + b[2] * b[3] - inter))


def _clip_box(box: np.ndarray, width: int, height: int) -> np.ndarray:
    """xywh box clipped to the image and rounded to 1/100 px."""
    x1, y1 = max(0.0, box[0]), max(0.0, box[1])
    x2, y2 = min(float(width), box[0] + box[2]), min(float(height), box[1] + box[3])
    x1, y1, x2, y2 = (round(v, 2) for v in (x1, y1, x2, y2))
    return np.array([x1, y1, round(x2 - x1, 2), round(y2 - y1, 2)])


def _loose_box(rng: np.random.Generator, clean: np.ndarray, width: int, height: int) -> np.ndarray | None:
    """A grown and shifted version of ``clean`` (xywh) with IoU inside LOOSE_BOX_IOU, or None."""
    lo, hi = LOOSE_BOX_IOU
    margin = 0.1 * (hi - lo)           # stay clear of the edges so rounding cannot leave the range
    for _ in range(40):
        grow = rng.uniform(0.12, 0.5, 2)
        shift = rng.uniform(0.04, 0.2, 2) * rng.choice([-1.0, 1.0], 2)
        w, h = clean[2:] * (1 + grow)
        cx, cy = clean[:2] + clean[2:] / 2 + shift * clean[2:]
        box = _clip_box(np.array([cx - w / 2, cy - h / 2, w, h]), width, height)
        if box[2] > 0 and box[3] > 0 and lo + margin <= _iou_xywh(box, clean) <= hi - margin:
            return box
    return None


def _duplicate_box(rng: np.random.Generator, clean: np.ndarray, width: int, height: int) -> np.ndarray:
    """A second box for the same object: an exact copy or a jitter of a few percent, IoU at least 0.97."""
    if rng.random() < 0.3:
        return clean.copy()
    for _ in range(20):
        jitter = rng.uniform(-0.012, 0.012, 4) * np.concatenate([clean[2:], clean[2:]])
        box = _clip_box(clean + jitter, width, height)
        if box[2] > 0 and box[3] > 0 and _iou_xywh(box, clean) >= DUPLICATE_MIN_IOU + 0.02:
            return box
    return clean.copy()


def _check_fault_rates(fault_rates: dict[str, float] | None) -> dict[str, float]:
    rates = dict(DEFAULT_FAULT_RATES)
    if fault_rates is not None:
        unknown = sorted(set(fault_rates) - set(DEFAULT_FAULT_RATES))
        if unknown:
            raise ValueError(f"generate_demo: unknown fault kind(s) {unknown} in fault_rates; "
                             f"expected some of {sorted(DEFAULT_FAULT_RATES)}")
        rates.update({k: float(v) for k, v in fault_rates.items()})
    bad = {k: v for k, v in rates.items() if not (0.0 <= v <= 1.0)}
    if bad:
        raise ValueError(f"generate_demo: fault_rates must lie in [0, 1], got {bad}")
    if sum(rates.values()) > 1.0:
        raise ValueError(f"generate_demo: fault_rates add up to {sum(rates.values()):.3f}; each object gets "
                         f"at most one fault, so they must add up to at most 1")
    return rates


def _plant_faults(rng: np.random.Generator, objects: list[dict[str, Any]], sizes: list[tuple[int, int]],
                  rates: dict[str, float]) -> dict[int, tuple[str, Any]]:
    """Choose which objects get which fault: ``{object index: (kind, written value)}``.

    Each kind gets ``round(rate * number of objects)`` objects (fewer only if no loose box fits),
    drawn without overlap from one random permutation. ``sizes[i]`` is (width, height) of object i's image.
    """
    n = len(objects)
    order = iter(rng.permutation(n).tolist())
    faults: dict[int, tuple[str, Any]] = {}
    name_to_index = {name: i for i, (_, name, _) in enumerate(CATEGORIES)}
    for kind in ("wrong_class", "missing_box", "loose_box", "duplicate_box"):
        wanted = int(round(rates[kind] * n))
        while wanted > 0:
            i = next(order, None)
            if i is None:
                break
            obj = objects[i]
            clean = np.asarray(obj["bbox"], dtype=np.float64)
            if kind == "wrong_class":
                options = CONFUSIONS[CATEGORIES[obj["category"]][1]]
                value: Any = name_to_index[options[int(rng.integers(len(options)))]]
            elif kind == "missing_box":
                value = None
            elif kind == "loose_box":
                value = _loose_box(rng, clean, *sizes[i])
                if value is None:
                    continue
            else:
                value = _duplicate_box(rng, clean, *sizes[i])
            faults[i] = (kind, value)
            wanted -= 1
    return faults


def _ids(rng: np.random.Generator, count: int, start_low: int, start_high: int, gap_rate: float) -> list[int]:
    """Increasing ids that start well above 1 and skip some values (as real exports do)."""
    if count == 0:
        return []
    steps = 1 + (rng.random(count) < gap_rate) * rng.integers(1, 6, count)
    return (int(rng.integers(start_low, start_high)) + np.cumsum(steps) - steps[0]).tolist()


def generate_demo(out_dir: str | Path, *, num_images: int = 300, seed: int = 0, width: int = 320,
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
        ``loose_box``, ``duplicate_box``; missing keys keep :data:`DEFAULT_FAULT_RATES`.
    progress : show a tqdm bar while drawing.

    Returns
    -------
    DemoPaths with the three paths written.
    """
    if num_images < 1:
        raise ValueError(f"generate_demo: num_images must be at least 1, got {num_images}")
    if min(width, height) < 96:
        raise ValueError(f"generate_demo: images must be at least 96 x 96 px, got {width} x {height}")
    rates = _check_fault_rates(fault_rates)
    out_dir = Path(out_dir)
    images_dir = out_dir / "images"
    images_dir.mkdir(parents=True, exist_ok=True)

    ids_seq, fault_seq, *image_seqs = np.random.SeedSequence(seed).spawn(num_images + 2)
    ids_rng = np.random.default_rng(ids_seq)
    image_ids = _ids(ids_rng, num_images, 400, 900, 0.2)

    objects: list[dict[str, Any]] = []
    image_records: list[dict[str, Any]] = []
    sizes: list[tuple[int, int]] = []
    for k in tqdm(range(num_images), desc="demo images", unit="img", disable=not progress):
        rng = np.random.default_rng(image_seqs[k])
        scene = _layout(rng, width, height)
        pixels, strength = _render(rng, scene)
        file_name = f"table_{image_ids[k]:05d}.jpg"
        ok, encoded = cv2.imencode(".jpg", pixels, [cv2.IMWRITE_JPEG_QUALITY, JPEG_QUALITY])
        if not ok:
            raise RuntimeError(f"generate_demo: OpenCV could not encode image {file_name}")
        (images_dir / file_name).write_bytes(encoded.tobytes())
        image_records.append({"image_id": image_ids[k], "file_name": file_name, "width": width,
                              "height": height, **scene.conditions, **strength})
        for obj in scene.objects:
            objects.append({"image_id": image_ids[k], "category": obj.category, "bbox": list(obj.bbox),
                            "tiny": obj.tiny, "in_group": obj.in_group,
                            "in_image_fraction": round(obj.in_pixels / obj.full_pixels, 3),
                            "visible_fraction": round(obj.visible_pixels / obj.in_pixels, 3)})
            sizes.append((width, height))
    kept = {r["file_name"] for r in image_records}
    for stale in images_dir.glob("table_*.jpg"):     # images of an earlier, larger run in the same folder
        if stale.name not in kept:
            stale.unlink()

    faults = _plant_faults(np.random.default_rng(fault_seq), objects, sizes, rates)
    extra = sum(1 for kind, _ in faults.values() if kind == "duplicate_box")
    missing = sum(1 for kind, _ in faults.values() if kind == "missing_box")
    ann_ids = iter(_ids(ids_rng, len(objects) - missing + extra, 7000, 7500, 0.1))
    cat_ids = [c for c, _, _ in CATEGORIES]

    annotations: list[dict[str, Any]] = []
    truth_objects: list[dict[str, Any]] = []
    fault_records: list[dict[str, Any]] = []

    def annotate(image_id: int, category: int, box: np.ndarray | list[float]) -> int:
        ann_id = next(ann_ids)
        x, y, w, h = (float(v) for v in box)
        annotations.append({"id": ann_id, "image_id": image_id, "category_id": cat_ids[category],
                            "bbox": [x, y, w, h], "area": w * h, "iscrowd": 0})
        return ann_id

    for i, obj in enumerate(objects):
        kind, value = faults.get(i, (None, None))
        clean = obj["bbox"]
        record = {"image_id": obj["image_id"], "category_id": cat_ids[obj["category"]], "clean_bbox": clean,
                  "tiny": obj["tiny"], "truncated": obj["in_image_fraction"] < 0.98,
                  "in_image_fraction": obj["in_image_fraction"], "visible_fraction": obj["visible_fraction"],
                  "in_group": obj["in_group"], "fault": kind}
        if kind == "missing_box":
            record["annotation_id"] = None
            fault_records.append({"kind": kind, "image_id": obj["image_id"], "category_id": record["category_id"],
                                  "bbox": clean})
        elif kind == "wrong_class":
            record["annotation_id"] = annotate(obj["image_id"], value, clean)
            fault_records.append({"kind": kind, "image_id": obj["image_id"], "annotation_id": record["annotation_id"],
                                  "written_category_id": cat_ids[value], "true_category_id": record["category_id"]})
        elif kind == "loose_box":
            record["annotation_id"] = annotate(obj["image_id"], obj["category"], value)
            fault_records.append({"kind": kind, "image_id": obj["image_id"], "annotation_id": record["annotation_id"],
                                  "written_bbox": [float(v) for v in value], "clean_bbox": clean,
                                  "iou": round(_iou_xywh(value, np.asarray(clean)), 4)})
        else:
            record["annotation_id"] = annotate(obj["image_id"], obj["category"], clean)
            if kind == "duplicate_box":
                dup_id = annotate(obj["image_id"], obj["category"], value)
                fault_records.append({"kind": kind, "image_id": obj["image_id"], "annotation_id": dup_id,
                                      "duplicate_of": record["annotation_id"], "bbox": [float(v) for v in value],
                                      "iou": round(_iou_xywh(value, np.asarray(clean)), 4)})
        truth_objects.append(record)

    categories = [{"id": c, "name": n, "supercategory": s} for c, n, s in CATEGORIES]
    coco = {"info": {"description": f"detdiff demo: {SCENARIO}", "version": "1", "seed": seed},
            "images": [{"id": r["image_id"], "file_name": r["file_name"], "width": width, "height": height}
                       for r in image_records],
            "annotations": annotations, "categories": categories}
    truth = {"scenario": SCENARIO, "seed": seed, "fault_rates": rates,
             "loose_box_iou_range": list(LOOSE_BOX_IOU), "duplicate_min_iou": DUPLICATE_MIN_IOU,
             "categories": categories,
             "counts": {"images": len(image_records), "annotations": len(annotations),
                        "categories": len(categories), "objects": len(truth_objects),
                        **{k: sum(1 for f in fault_records if f["kind"] == k) for k in DEFAULT_FAULT_RATES}},
             "faults": fault_records, "objects": truth_objects, "images": image_records}
    paths = DemoPaths(annotations=out_dir / "annotations.json", images_dir=images_dir, truth=out_dir / "truth.json")
    write_json_atomic(paths.annotations, coco, sort_keys=True)
    write_json_atomic(paths.truth, truth, sort_keys=True)
    return paths
