"""Drawing kit shared by the drawn demo scenarios: shapes, drawing and masks, placement, light and blur.

A thing is a list of :class:`Op` (cv2 drawing calls) in its own frame, origin at its centre, x to the
right. :func:`place_object` puts one into a :class:`Scene` at a position where every object placed
so far stays visible enough, and records its box and how much of it is inside the image and visible;
:func:`put_object` and :func:`put_occluder` do the same at a spot the scene chose (a parking bay, a
berth, a house number), touching only the window they cover, for layouts of many objects.
:func:`cast_shadow` and :func:`light_and_lens` turn the drawn scene into a photograph-like image.
Nothing here draws at random except through the ``rng`` it is given, so a scenario's random-stream
order is the order of its calls.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import cv2
import numpy as np

SHIFT = 2                   # cv2 drawing at 1/4 px precision (coordinates are multiplied by 2**SHIFT)
#: A truncated object keeps this share of its pixels inside the image.
TRUNCATED_IN_IMAGE: tuple[float, float] = (0.35, 0.85)


@dataclass
class Op:
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


def rect(w: float, h: float, cx: float = 0.0, cy: float = 0.0) -> np.ndarray:
    """Corners ``[4, 2]`` of an axis-aligned w x h rectangle centred on (cx, cy)."""
    return np.array([[-w / 2, -h / 2], [w / 2, -h / 2], [w / 2, h / 2], [-w / 2, h / 2]]) + [cx, cy]


def rounded_rect(w: float, h: float, r: float, cx: float = 0.0, cy: float = 0.0, n: int = 4) -> np.ndarray:
    """Polygon ``[4 * (n + 1), 2]`` of a w x h rectangle with corner radius r, centred on (cx, cy)."""
    r = min(r, w / 2, h / 2)
    centres = np.array([[w / 2 - r, -h / 2 + r], [w / 2 - r, h / 2 - r], [-w / 2 + r, h / 2 - r],
                        [-w / 2 + r, -h / 2 + r]])
    start = np.array([-0.5, 0.0, 0.5, 1.0]) * math.pi                      # one quarter arc per corner
    angles = start[:, None] + np.linspace(0, math.pi / 2, n + 1)[None, :]  # [4, n + 1]
    arcs = centres[:, None, :] + r * np.stack([np.cos(angles), np.sin(angles)], axis=-1)
    return arcs.reshape(-1, 2) + [cx, cy]


def jitter_colour(rng: np.random.Generator, bgr: tuple[float, float, float], spread: float = 10.0,
                  brightness: tuple[float, float] = (0.85, 1.15)) -> np.ndarray:
    """A within-class variant of a BGR colour: overall brightness scale plus per-channel noise."""
    c = np.asarray(bgr, dtype=np.float64) * rng.uniform(*brightness) + rng.normal(0.0, spread, 3)
    return np.clip(c, 0, 255)


def shade(colour: np.ndarray, factor: float, add: float = 0.0) -> tuple[float, float, float]:
    """``colour * factor + add``, clipped to 0..255, as a cv2 colour tuple."""
    return tuple(float(v) for v in np.clip(np.asarray(colour) * factor + add, 0, 255))


def rotate(ops: list[Op], angle: float) -> list[Op]:
    """The same ops rotated by ``angle`` radians about the object's centre."""
    c, s = math.cos(angle), math.sin(angle)
    rot = np.array([[c, -s], [s, c]])
    return [Op(op.kind, op.points @ rot.T, op.colour, op.thickness, op.radius, op.inner) for op in ops]


def extent(ops: list[Op]) -> float:
    """Radius of a disc about the origin holding every drawn pixel."""
    reach = 0.0
    for op in ops:
        pad = (op.thickness / 2 if op.thickness > 0 else 0.0) + op.radius
        reach = max(reach, float(np.linalg.norm(op.points, axis=1).max()) + pad)
    return reach + 1.0


def draw(canvas: np.ndarray, ops: list[Op], centre: tuple[int, int], *, mask: bool = False) -> None:
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
# Placement: where things go, and what is visible of each.


@dataclass
class Placed:
    """One object put into a :class:`Scene`, with its pixel counts and its box (xywh, visible extent)."""

    category: int               # index into the scenario's categories
    ops: list[Op]
    centre: tuple[int, int]
    tiny: bool
    in_group: bool
    min_visible: float
    full_pixels: int = 0
    in_pixels: int = 0
    visible_pixels: int = 0
    bbox: tuple[float, float, float, float] = (0.0, 0.0, 0.0, 0.0)


@dataclass
class Scene:
    """One image's layout: size, image conditions, objects in drawing order and who owns each pixel."""

    width: int
    height: int
    conditions: dict[str, bool]
    objects: list[Placed] = field(default_factory=list)
    owner: np.ndarray | None = None          # int16 [H, W]: index of the object seen at each pixel, -1 = background


def local_mask(ops: list[Op]) -> tuple[np.ndarray, int]:
    """Silhouette ``uint8 [L, L]`` of an object drawn with its origin at pixel (c, c); returns (mask, c)."""
    c = int(math.ceil(extent(ops))) + 1
    canvas = np.zeros((2 * c + 1, 2 * c + 1), dtype=np.uint8)
    draw(canvas, ops, (c, c), mask=True)
    return canvas, c


def clip_window(centre: tuple[int, int], c: int, size: int, width: int, height: int
                ) -> tuple[slice, slice, slice, slice]:
    """Matching (image rows, image cols, mask rows, mask cols) of a mask of side ``size`` at ``centre``."""
    x0, y0 = centre[0] - c, centre[1] - c
    ix0, iy0 = max(0, x0), max(0, y0)
    ix1, iy1 = min(width, x0 + size), min(height, y0 + size)
    return (slice(iy0, max(iy0, iy1)), slice(ix0, max(ix0, ix1)),
            slice(iy0 - y0, max(iy0, iy1) - y0), slice(ix0 - x0, max(ix0, ix1) - x0))


def place_object(rng: np.random.Generator, scene: Scene, category: int, ops: list[Op], *, tiny: bool,
                 truncate: bool, group_centre: tuple[float, float] | None, spread: float, min_visible: float,
                 tries: int, u: float) -> None:
    """Try up to ``tries`` positions for ``ops``; append the first that leaves everything visible enough.

    Free objects land anywhere inside the image; group members scatter (normal, ``spread`` px) about
    ``group_centre``; ``truncate`` puts the object across a border with TRUNCATED_IN_IMAGE of it inside
    and at least ``6 * u`` px of it seen each way. ``min_visible`` is the share of its in-image pixels
    the new object must keep visible while later objects are placed. Nothing is added if no try fits.
    """
    mask, c = local_mask(ops)
    silhouette = mask > 0
    full = int(silhouette.sum())
    W, H = scene.width, scene.height
    if 2 * c + 2 >= min(W, H):
        return
    in_group = group_centre is not None
    for _ in range(tries):
        if in_group:
            cx = int(np.clip(round(group_centre[0] + rng.normal(0, spread)), c, W - 1 - c))
            cy = int(np.clip(round(group_centre[1] + rng.normal(0, spread)), c, H - 1 - c))
        elif truncate:
            edge = int(rng.integers(4))                        # left, right, top, bottom
            depth = int(round(rng.uniform(-0.3, 0.45) * c))    # centre distance inside the border
            along = int(rng.integers(c, (H if edge < 2 else W) - c))
            cx, cy = ((depth, along), (W - 1 - depth, along), (along, depth), (along, H - 1 - depth))[edge]
        else:
            cx, cy = int(rng.integers(c, W - c)), int(rng.integers(c, H - c))
        rows, cols, mrows, mcols = clip_window((cx, cy), c, mask.shape[0], W, H)
        inside = silhouette[mrows, mcols]
        in_pixels = int(inside.sum())
        if in_pixels == 0:
            continue
        if truncate:
            ys, xs = np.nonzero(inside)
            lo, hi = TRUNCATED_IN_IMAGE
            if not (lo <= in_pixels / full <= hi) or min(np.ptp(xs), np.ptp(ys)) + 1 < 6 * u:
                continue
        owner = scene.owner.copy()
        owner[rows, cols][inside] = len(scene.objects)
        visible = np.bincount(owner.ravel().astype(np.int64) + 1, minlength=len(scene.objects) + 2)[1:]
        if any(visible[j] < obj.min_visible * obj.in_pixels for j, obj in enumerate(scene.objects)):
            continue
        scene.owner = owner
        scene.objects.append(Placed(category, ops, (cx, cy), tiny, in_group, min_visible, full, in_pixels,
                                    0, _tight_box(rows, cols, inside)))
        return


def _tight_box(rows: slice, cols: slice, inside: np.ndarray) -> tuple[float, float, float, float]:
    """xywh box, in image pixels, of the true pixels of ``inside`` (the image window ``rows, cols``)."""
    ys, xs = np.nonzero(inside)
    return (float(cols.start + xs.min()), float(rows.start + ys.min()),
            float(xs.max() - xs.min() + 1), float(ys.max() - ys.min() + 1))


def _cover(scene: Scene, rows: slice, cols: slice, inside: np.ndarray, value: int, exclusive: bool) -> bool:
    """Give the ``inside`` pixels of the window to ``value`` unless that hides too much of an object below.

    Refused when ``exclusive`` and any object is covered, or when a covered object would keep less
    than its ``min_visible`` share of its in-image pixels; bookkeeping stays inside the window.
    """
    window = scene.owner[rows, cols]
    below = window[inside]
    below = below[below >= 0].astype(np.int64)
    if below.size:
        if exclusive:
            return False
        lost = np.bincount(below, minlength=len(scene.objects))
        hit = np.nonzero(lost)[0]
        if any(scene.objects[j].visible_pixels - lost[j] < scene.objects[j].min_visible * scene.objects[j].in_pixels
               for j in hit):
            return False
        for j in hit:
            scene.objects[j].visible_pixels -= int(lost[j])
    window[inside] = value
    return True


def put_object(scene: Scene, category: int, silhouette: np.ndarray, c: int, centre: tuple[int, int], *,
               ops: list[Op], min_visible: float, exclusive: bool = False, min_in_image: float = 0.3,
               min_side: float = 3.0, in_group: bool = False) -> Placed | None:
    """Put an object at a fixed ``centre`` on top of what is there; its :class:`Placed`, or None if refused.

    ``silhouette`` is ``bool [L, L]`` with the object's origin at pixel (c, c) (see :func:`local_mask`).
    Refused when under ``min_in_image`` of its pixels fall inside the image, when its in-image box is
    under ``min_side`` px either way, or when covering objects below is refused (see ``exclusive`` and
    ``min_visible`` in :func:`_cover`). Unlike :func:`place_object` it keeps ``visible_pixels`` up to
    date as it goes and touches only the window it covers, so a scene must be built with it alone.
    """
    full = int(silhouette.sum())
    rows, cols, mrows, mcols = clip_window(centre, c, silhouette.shape[0], scene.width, scene.height)
    inside = silhouette[mrows, mcols]
    in_pixels = int(inside.sum())
    if full == 0 or in_pixels < max(1.0, min_in_image * full):
        return None
    bbox = _tight_box(rows, cols, inside)
    if min(bbox[2], bbox[3]) < min_side or not _cover(scene, rows, cols, inside, len(scene.objects), exclusive):
        return None
    placed = Placed(category, ops, centre, False, in_group, min_visible, full, in_pixels, in_pixels, bbox)
    scene.objects.append(placed)
    return placed


def put_occluder(scene: Scene, silhouette: np.ndarray, c: int, centre: tuple[int, int]) -> bool:
    """Cover pixels with something that is not an object (a tree canopy) if every object below stays visible enough."""
    rows, cols, mrows, mcols = clip_window(centre, c, silhouette.shape[0], scene.width, scene.height)
    inside = silhouette[mrows, mcols]
    return bool(inside.any()) and _cover(scene, rows, cols, inside, -1, False)


def settle_visibility(scene: Scene) -> None:
    """Set each placed object's ``visible_pixels`` once the layout is final."""
    visible = np.bincount(scene.owner.ravel().astype(np.int64) + 1, minlength=len(scene.objects) + 1)[1:]
    for obj, v in zip(scene.objects, visible):
        obj.visible_pixels = int(v)


def object_record(obj: Placed, image_id: int) -> dict[str, Any]:
    """The object as the fault planter takes it: image, category index, clean box, difficulty fields."""
    in_image_fraction = round(obj.in_pixels / obj.full_pixels, 3)
    return {"image_id": image_id, "category": obj.category, "bbox": list(obj.bbox), "tiny": obj.tiny,
            "in_group": obj.in_group, "in_image_fraction": in_image_fraction,
            "truncated": in_image_fraction < 0.98,
            "visible_fraction": round(obj.visible_pixels / obj.in_pixels, 3)}


# --------------------------------------------------------------------------------------------------
# Image conditions: shadows, light, blur, noise.


def cast_shadow(image: np.ndarray, owner: np.ndarray, u: float) -> np.ndarray:
    """``image`` darkened by soft shadows of the owned pixels, cast down and to the right (light above)."""
    silhouette = (owner >= 0).astype(np.float32)
    dx, dy = max(1, round(2 * u)), max(1, round(3 * u))
    shadow = np.zeros_like(silhouette)
    shadow[dy:, dx:] = silhouette[:-dy, :-dx]
    shadow = cv2.GaussianBlur(shadow, (0, 0), 2.0 * u)
    return (image * (1.0 - 0.35 * shadow)[:, :, None]).astype(np.uint8)


def light_and_lens(rng: np.random.Generator, image: np.ndarray, *, dim: bool, blur: bool, u: float
                   ) -> tuple[np.ndarray, dict[str, float]]:
    """Lamp falloff, dim light, blur and sensor noise applied to ``uint8 [H, W, 3]`` pixels.

    Returns the new ``uint8`` pixels and the strength of each condition (``blur_sigma``, ``light_gain``,
    ``noise_sigma``): brighter under the lamp, dim images darker and noisier.
    """
    H, W = image.shape[:2]
    yy, xx = np.mgrid[0:H, 0:W].astype(np.float32)
    lx, ly = rng.uniform(0.3, 0.7) * W, rng.uniform(0.3, 0.7) * H
    gain = 1.08 - 0.35 * (((xx - lx) / W) ** 2 + ((yy - ly) / H) ** 2)
    light = float(rng.uniform(0.28, 0.45)) if dim else 1.0
    pixels = image.astype(np.float32) * (gain * light)[:, :, None]
    blur_sigma = float(rng.uniform(1.4, 2.6) * u) if blur else 0.0
    if blur_sigma:
        pixels = cv2.GaussianBlur(pixels, (0, 0), blur_sigma)
    noise_sigma = float(rng.uniform(7, 11)) if dim else float(rng.uniform(1.5, 3.0))
    pixels += rng.standard_normal(pixels.shape, dtype=np.float32) * noise_sigma
    strength = {"blur_sigma": round(blur_sigma, 3), "light_gain": round(light, 3),
                "noise_sigma": round(noise_sigma, 3)}
    return np.clip(np.rint(pixels), 0, 255).astype(np.uint8), strength
