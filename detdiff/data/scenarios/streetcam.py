"""The street-camera scenario: a city street at real photo sizes, 24 long-tailed look-alike classes, many tiny objects.

A camera on a pole looks along a street: sky, building fronts of brick, plaster and concrete with
windows and shop fronts, pavements, a road with lane markings. Surfaces are made from scikit-image's
bundled photographs and textures (``skimage.data``, shipped with the package, no download), tinted,
tiled and warped into perspective; posters and bus adverts are photo patches. Objects (vehicles,
two-wheelers, pedestrians, traffic lights, signs, street furniture) are drawn with the drawing kit at
full image size, in 24 classes that come in look-alike groups and with a long-tailed frequency. Sizes
follow perspective, so far objects are tiny: most boxes are under 32 x 32 px. Images range from
640 x 480 to 4000 x 3000 in both orientations. Label faults are planted by
:func:`~detdiff.data.scenarios.faults.write_dataset`; a wrong class is drawn within the object's
look-alike group in proportion to class frequency. ``demo/README.md`` documents the scene.

Same seed, same bytes: everything follows the seeding contract of :mod:`detdiff.data.scenarios.faults`.
"""

from __future__ import annotations

import functools
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import cv2
import numpy as np
from tqdm import tqdm

from detdiff.data.scenarios.drawing import Op, Placed, draw, jitter_colour, object_record
from detdiff.data.scenarios.street_things import BUILDERS, Thing, bgr, one_of, tree
from detdiff.data.scenarios.faults import (
    DemoPaths, check_fault_rates, image_ids, remove_stale_images, spawn_streams, write_dataset, write_image)

SCENARIO = ("city street seen from a pole-mounted camera looking along the road; photos from 640 x 480 "
            "to 4000 x 3000, 24 look-alike classes, mostly small objects")

#: (COCO id, name, look-alike group). Ids are deliberately not contiguous and do not start at 0 or 1.
CATEGORIES: tuple[tuple[int, str, str], ...] = (
    (2, "car", "car_like"), (5, "taxi", "car_like"), (6, "police_car", "car_like"), (9, "van", "car_like"),
    (13, "bus", "large_vehicle"), (14, "tram", "large_vehicle"), (17, "truck", "large_vehicle"),
    (21, "bicycle", "two_wheeler"), (22, "motorcycle", "two_wheeler"), (24, "scooter", "two_wheeler"),
    (30, "pedestrian_adult", "person"), (31, "pedestrian_child", "person"),
    (40, "light_red", "traffic_light"), (41, "light_amber", "traffic_light"),
    (42, "light_green", "traffic_light"),
    (50, "sign_speed_limit", "round_sign"), (51, "sign_no_entry", "round_sign"),
    (53, "sign_no_parking", "round_sign"), (55, "sign_give_way", "round_sign"), (58, "sign_stop", "round_sign"),
    (61, "litter_bin", "street_furniture"), (62, "post_box", "street_furniture"),
    (64, "bollard", "street_furniture"), (67, "traffic_cone", "street_furniture"),
)
NAMES: tuple[str, ...] = tuple(name for _, name, _ in CATEGORIES)
_INDEX = {name: i for i, name in enumerate(NAMES)}
#: Share of each class among all objects, in per mille: long-tailed, the commonest class (car) 19 times
#: the rarest (police car). Wrong-class faults are drawn with these weights (see CONFUSIONS).
CLASS_FREQUENCY: dict[str, int] = {
    "car": 190, "taxi": 34, "police_car": 10, "van": 38, "bus": 24, "tram": 11, "truck": 20,
    "bicycle": 38, "motorcycle": 22, "scooter": 14, "pedestrian_adult": 110, "pedestrian_child": 25,
    "light_red": 56, "light_amber": 12, "light_green": 56, "sign_speed_limit": 38, "sign_no_entry": 24,
    "sign_no_parking": 17, "sign_give_way": 30, "sign_stop": 15, "litter_bin": 48, "post_box": 19,
    "bollard": 45, "traffic_cone": 26}
#: Weights (per mille) the class of each free-standing object is drawn with. Big vehicles are more often
#: dropped (they would hide others), crowds add people, vehicles, two-wheelers and cones; these weights
#: were tuned on 1,500 layouts so that the shares of placed objects match CLASS_FREQUENCY.
DRAW_WEIGHTS: dict[str, float] = {
    "car": 197, "taxi": 37, "police_car": 10.6, "van": 58, "bus": 52, "tram": 25, "truck": 51, "bicycle": 29,
    "motorcycle": 21, "scooter": 12.6, "pedestrian_adult": 78, "pedestrian_child": 16, "light_red": 57,
    "light_amber": 12.9, "light_green": 60, "sign_speed_limit": 39.4, "sign_no_entry": 25, "sign_no_parking": 18.8,
    "sign_give_way": 31.6, "sign_stop": 15.7, "litter_bin": 49, "post_box": 20.6, "bollard": 62.6, "traffic_cone": 20.5}
_DRAW_P = np.array([DRAW_WEIGHTS[n] for n in NAMES]) / sum(DRAW_WEIGHTS.values())
#: Look-alike group -> member class names (the groups are the supercategories).
LOOKALIKE_GROUPS: dict[str, tuple[str, ...]] = {
    g: tuple(n for _, n, s in CATEGORIES if s == g) for g in dict.fromkeys(s for _, _, s in CATEGORIES)}


def frequency_confusions() -> dict[str, tuple[str, ...]]:
    """Class -> the other members of its look-alike group, each repeated in proportion to its frequency.

    The fault planter draws a wrong class uniformly from this list, so a planted wrong class is one of
    the group's look-alikes with probability proportional to how common that class is.
    """
    table: dict[str, tuple[str, ...]] = {}
    for members in LOOKALIKE_GROUPS.values():
        for name in members:
            others = [m for m in members if m != name]
            unit = functools.reduce(math.gcd, (CLASS_FREQUENCY[m] for m in others))
            table[name] = tuple(m for m in others for _ in range(CLASS_FREQUENCY[m] // unit))
    return table


#: Wrong-class options for the fault planter: look-alikes weighted by class frequency.
CONFUSIONS: dict[str, tuple[str, ...]] = frequency_confusions()

#: Share of objects that receive each planted fault (this scene's default; see faults.DEFAULT_FAULT_RATES).
FAULT_RATES: dict[str, float] = {"wrong_class": 0.05, "missing_box": 0.05, "loose_box": 0.05, "duplicate_box": 0.01}
#: (width, height, weight) of landscape image sizes; PORTRAIT_RATE of images are turned upright.
IMAGE_SIZES: tuple[tuple[int, int, float], ...] = (
    (640, 480, 0.15), (1024, 768, 0.12), (1280, 720, 0.20), (1920, 1080, 0.22), (2048, 1536, 0.13),
    (3000, 2000, 0.13), (4000, 3000, 0.05))
PORTRAIT_RATE = 0.2
#: Share of images with each condition (drawn independently per image).
IMAGE_CONDITION_RATES: dict[str, float] = {"blur": 0.1, "dim": 0.12, "crowded": 0.3}
FREE_MIN_VISIBLE = 0.5      # a free-standing object keeps at least this share of its in-image pixels visible
GROUP_MIN_VISIBLE = 0.3     # an object in a crowd keeps at least this share visible
TRUNCATED_RATE = 0.15      # share of free-standing objects moved onto the left or right image border
MIN_IN_IMAGE = 0.35         # an object crossing the border keeps at least this share of its pixels inside
MIN_SIDE_PX, MIN_LONG_PX = 4, 8   # no object is drawn with a box side under 4 px or a longest side under 8 px
FAR_OBJECTS_PER_1000_PX = 12   # extra far objects (at least FAR_FROM metres away) in large frames, see layout()
FAR_FROM = 60.0
BACKGROUND_MAX_SIDE = 1600  # the background is made at most this large, then resized to the image size
JPEG_QUALITY = 88


# --------------------------------------------------------------------------------------------------
# Photographs and textures from scikit-image (bundled with the package).


@functools.lru_cache(maxsize=None)
def _photo(name: str, level: int = 0) -> np.ndarray:
    """A ``skimage.data`` image as ``uint8 [H, W, 3]`` BGR, halved ``level`` times (grey images on three channels)."""
    if level > 0:
        finer = _photo(name, level - 1)
        return cv2.resize(finer, (max(1, finer.shape[1] // 2), max(1, finer.shape[0] // 2)),
                          interpolation=cv2.INTER_AREA)
    try:
        from skimage import data
    except ImportError as err:
        raise ImportError("the streetcam scenario takes its photos from scikit-image (pip install "
                          "scikit-image)") from err
    pixels = getattr(data, name)()
    if pixels.ndim == 2:
        return np.ascontiguousarray(np.repeat(pixels[:, :, None], 3, axis=2))
    return np.ascontiguousarray(pixels[:, :, 2::-1])


#: Photos shown on posters in shop windows and as bus and tram adverts (nothing on them is labelled).
POSTER_PHOTOS = ("astronaut", "coffee", "chelsea", "rocket", "hubble_deep_field", "coins", "page", "text")
#: Grey photos the surfaces are tinted from.
_TEXTURES = {"asphalt": "gravel", "paving": "gravel", "brick": "brick", "plaster": "moon", "concrete": "gravel",
             "grass": "grass"}


def _photo_crop(rng: np.random.Generator, name: str, width: int, height: int, aspect: float | None = None
                ) -> np.ndarray:
    """A random crop (at least half the photo's height) of a photo, resized to ``width x height`` px (BGR).

    The crop has ``aspect`` (width / height; default that of the result) and is taken from the coarsest
    halving of the photo that still has enough pixels, so small results cost little; the random draws
    do not depend on the size asked for.
    """
    c, u, v = rng.uniform(0.5, 1.0), rng.random(), rng.random()
    h, w = _photo(name).shape[:2]
    ch = c * h
    cw = min(float(w), max(8.0, ch * (aspect if aspect is not None else width / max(height, 1))))
    level = 0
    while level < 4 and ch / 2 ** (level + 1) >= height and cw / 2 ** (level + 1) >= width:
        level += 1
    photo = _photo(name, level)
    k = 2 ** level
    ph, pw = max(1, int(ch / k)), max(1, int(cw / k))
    y0, x0 = int(v * (photo.shape[0] - ph)), int(u * (photo.shape[1] - pw))
    return cv2.resize(photo[y0:y0 + ph, x0:x0 + pw], (max(1, width), max(1, height)), interpolation=cv2.INTER_AREA)


def _tinted(rng: np.random.Generator, texture: str, colour: tuple[float, float, float], contrast: float,
            width: int, height: int | None = None) -> np.ndarray:
    """A ``width x height`` tile of a grey photo texture, tinted to mean ``colour`` (BGR).

    The crop is square (a non-square tile is stretched, for planes seen at a grazing angle) and its
    grey spread is scaled by ``contrast``.
    """
    patch = _photo_crop(rng, _TEXTURES[texture], width, height or width, aspect=1.0)[:, :, 0]
    detail = patch.astype(np.float32) - np.float32(patch.mean())
    tile = np.asarray(colour, dtype=np.float32)[None, None, :] + np.float32(contrast) * detail[:, :, None]
    return np.clip(tile, 0, 255).astype(np.uint8)


def _fill(shape: tuple[int, int], tile: np.ndarray) -> np.ndarray:
    """``tile`` repeated to cover ``shape`` (rows, cols)."""
    reps = (shape[0] // tile.shape[0] + 1, shape[1] // tile.shape[1] + 1, 1)
    return np.tile(tile, reps)[:shape[0], :shape[1]]


def _poster(rng: np.random.Generator, width: int, height: int) -> np.ndarray:
    """A random crop of a random poster photo resized to ``width x height`` px (BGR)."""
    return _photo_crop(rng, POSTER_PHOTOS[int(rng.integers(len(POSTER_PHOTOS)))], width, height)


# --------------------------------------------------------------------------------------------------
# Camera, street and light.


@dataclass(frozen=True)
class Camera:
    """Pinhole camera at (X 0, Y ``height``, Z 0) looking along +Z with a level horizon (metres, px)."""

    focal: float        # px
    cx: float           # column of the vanishing point
    horizon: float      # row of the horizon
    height: float       # m above the road

    def project(self, x: float, y: float, z: float) -> tuple[float, float]:
        """Image position (column, row) of the world point (X right, Y up, Z ahead)."""
        return self.cx + self.focal * x / z, self.horizon + self.focal * (self.height - y) / z

    def scaled(self, k: float) -> Camera:
        """The same camera for an image resized by ``k``."""
        return Camera(self.focal * k, self.cx * k, self.horizon * k, self.height)


@dataclass
class Building:
    """One building front along a side of the street (metres along Z and up); ``seed`` draws its details."""

    z0: float
    z1: float
    height: float
    material: str
    colour: tuple[float, float, float]
    floor: float                            # storey height
    window: tuple[float, float, float]      # width, height, spacing
    shop: bool
    seed: int


@dataclass
class Street:
    """The street in camera coordinates (X of kerbs and building fronts, how far it runs).

    ``surface_seed`` draws the look of road and pavements, so that every depth band matches.
    """

    kerb_left: float
    kerb_right: float
    front_left: float
    front_right: float
    lanes: int
    z_end: float
    crossing_z: float | None
    surface_seed: int
    buildings: dict[str, list[Building]] = field(default_factory=dict)

    def lane_centres(self) -> np.ndarray:
        """X of each lane centre, left to right."""
        width = (self.kerb_right - self.kerb_left) / self.lanes
        return self.kerb_left + width * (np.arange(self.lanes) + 0.5)


_WALL_COLOURS: dict[str, tuple[tuple[float, float, float], ...]] = {
    "brick": ((60, 80, 150), (70, 110, 170), (110, 150, 190), (90, 90, 110)),
    "plaster": ((200, 215, 225), (170, 200, 220), (200, 190, 160), (150, 180, 200)),
    "concrete": ((150, 150, 150), (170, 165, 160), (120, 125, 125))}


def _camera(rng: np.random.Generator, width: int, height: int) -> Camera:
    """A camera for a ``width x height`` image: focal 0.5-0.75 x the long side, horizon 38-58% down."""
    return Camera(focal=float(rng.uniform(0.5, 0.75) * max(width, height)),
                  cx=float(rng.uniform(0.35, 0.65) * width), horizon=float(rng.uniform(0.38, 0.58) * height),
                  height=float(rng.uniform(1.8, 6.0)))


def _street(rng: np.random.Generator) -> Street:
    """Road, pavements and building fronts; the camera stands over the road or a pavement."""
    lanes = int(rng.choice([2, 3, 4], p=[0.45, 0.3, 0.25]))
    road = lanes * float(rng.uniform(3.0, 3.5))
    pave_l, pave_r = rng.uniform(2.5, 5.5, 2)
    offset = float(rng.uniform(-0.5, 0.5) * road + rng.uniform(-0.5, 0.5))
    kerb_left, kerb_right = -road / 2 - offset, road / 2 - offset
    z_end = float(rng.uniform(140, 320))
    crossing = float(rng.uniform(12, 60)) if rng.random() < 0.5 else None
    street = Street(kerb_left, kerb_right, kerb_left - float(pave_l), kerb_right + float(pave_r), lanes, z_end,
                    crossing, int(rng.integers(2**31)))
    for side in ("left", "right"):
        buildings: list[Building] = []
        z = 0.5
        while z < z_end + 10:
            length = float(rng.uniform(8, 32))
            material = str(rng.choice(["brick", "plaster", "concrete"], p=[0.45, 0.35, 0.2]))
            palette = _WALL_COLOURS[material]
            colour = bgr(one_of(rng, palette, 8))
            window = (float(rng.uniform(0.9, 1.5)), float(rng.uniform(1.3, 1.9)), float(rng.uniform(2.4, 3.6)))
            buildings.append(Building(z, z + length, float(rng.uniform(7, 26)), material, colour,
                                      float(rng.uniform(3.0, 3.6)), window, bool(rng.random() < 0.6),
                                      int(rng.integers(2**31))))
            z += length
        street.buildings[side] = buildings
    return street


@dataclass
class Look:
    """Light of one image: haze colour and visibility, overall light and colour cast, vignetting."""

    haze: np.ndarray
    visibility: float
    light: float
    tint: np.ndarray
    vignette: float
    centre: tuple[float, float]
    dim: bool

    def gain_image(self, width: int, height: int) -> np.ndarray:
        """``uint8 [H, W, 3]`` light gain over an image of this size, 128 = 1 (vignetting, light, colour cast)."""
        x = ((np.arange(32, dtype=np.float32) + 0.5) / 32 - self.centre[0]) ** 2
        y = ((np.arange(24, dtype=np.float32) + 0.5) / 24 - self.centre[1]) ** 2
        gain = self.light * (1.05 - self.vignette * (y[:, None] + x[None, :]))
        small = np.clip(gain[:, :, None] * self.tint[None, None, :] * 128, 0, 255).astype(np.uint8)
        return cv2.resize(small, (width, height), interpolation=cv2.INTER_LINEAR)

    def gain(self, x: float, y: float) -> np.ndarray:
        """BGR light gain at relative image position (``x``, ``y``): vignetting, light and colour cast."""
        return self.light * (1.05 - self.vignette * ((x - self.centre[0]) ** 2 + (y - self.centre[1]) ** 2)) * self.tint

    def colour(self, drawn: Any, z: float, x: float, y: float) -> tuple[float, float, float]:
        """A drawn colour (BGR) as seen at distance ``z`` and relative image position (``x``, ``y``)."""
        h = float(_haze(z, self.visibility))
        return bgr((np.asarray(drawn) * (1 - h) + self.haze * h) * self.gain(x, y))

    def seen(self, pixels: np.ndarray, z: float, gain: np.ndarray | None = None) -> np.ndarray:
        """``uint8`` pixels (a photo patch) through the haze at distance ``z``, times ``gain`` (BGR) if given."""
        h = np.float32(_haze(z, self.visibility))
        out = pixels.astype(np.float32) * (1 - h) + self.haze * h
        return np.clip(out if gain is None else out * gain.astype(np.float32), 0, 255).astype(np.uint8)


def _look(rng: np.random.Generator, dim: bool) -> Look:
    """Haze, light and colour cast of one image; dim images are dark and blue."""
    haze = np.array([200, 195, 190] if not dim else [140, 115, 95], np.float64) * rng.uniform(0.9, 1.05)
    tint = np.array([1.0, 1.0, 1.0]) + rng.normal(0, 0.03, 3)
    if dim:
        tint *= [1.12, 0.98, 0.85]
    return Look(haze.astype(np.float32), float(rng.uniform(300, 900) if not dim else rng.uniform(150, 400)),
                float(rng.uniform(0.28, 0.45) if dim else rng.uniform(0.9, 1.1)), tint.astype(np.float32),
                float(rng.uniform(0.1, 0.4)), (float(rng.uniform(0.35, 0.65)), float(rng.uniform(0.35, 0.65))), dim)


# --------------------------------------------------------------------------------------------------
# Background: sky, far end, road and pavements, building fronts (textures warped into perspective).


def _haze(z: np.ndarray | float, visibility: float) -> np.ndarray:
    """Share of the haze colour seen at distance ``z`` (metres)."""
    return 1.0 - np.exp(-np.asarray(z, dtype=np.float32) / np.float32(visibility))


def _fog(colour: Any, z: float, look: Look) -> tuple[float, float, float]:
    """``colour`` (BGR) as seen through the haze at distance ``z``."""
    weight = float(_haze(z, look.visibility))
    return bgr(np.asarray(colour, dtype=np.float64) * (1 - weight) + look.haze * weight)


def _fill_quad(canvas: np.ndarray, quad: np.ndarray, colour: tuple[float, float, float]) -> None:
    """Fill the convex image polygon ``quad`` (float px ``[n, 2]``) at 1/4 px precision."""
    pts = np.rint(quad * 4).astype(np.int32)
    cv2.fillConvexPoly(canvas, pts, colour, cv2.LINE_AA, 2)


def _pixel_box(canvas: np.ndarray, quad: np.ndarray) -> tuple[int, int, int, int] | None:
    """Integer (x0, y0, x1, y1) of the image polygon ``quad`` clipped to ``canvas``, or None if outside."""
    H, W = canvas.shape[:2]
    x0, y0 = np.clip(np.floor(quad.min(0)), 0, [W, H]).astype(int)
    x1, y1 = np.clip(np.ceil(quad.max(0)) + 1, 0, [W, H]).astype(int)
    return (int(x0), int(y0), int(x1), int(y1)) if x1 > x0 and y1 > y0 else None


def _warp_onto(canvas: np.ndarray, quad: np.ndarray, source: np.ndarray, source_to_image: np.ndarray) -> None:
    """Warp ``source`` through a homography (source px to image px) and paint it inside the polygon ``quad``.

    Only the polygon's bounding box is warped. OpenCV's warpPerspective hangs on a matrix whose
    M[2, 2] is zero, so the callers keep their source origin off the camera plane (and such a matrix
    is skipped here).
    """
    box = _pixel_box(canvas, quad)
    if box is None:
        return
    x0, y0, x1, y1 = box
    matrix = np.array([[1.0, 0.0, -x0], [0.0, 1.0, -y0], [0.0, 0.0, 1.0]]) @ source_to_image
    if not abs(matrix[2, 2]) > 1e-9:
        return
    size = (x1 - x0, y1 - y0)
    warped = cv2.warpPerspective(source, matrix / matrix[2, 2], size, flags=cv2.INTER_LINEAR,
                                 borderMode=cv2.BORDER_REPLICATE)
    cover = np.zeros((size[1], size[0]), np.uint8)
    _fill_quad(cover, quad - [x0, y0], 255)
    np.copyto(canvas[y0:y1, x0:x1], warped, where=cover[:, :, None] > 127)


def _paint_plane(canvas: np.ndarray, quad: np.ndarray, plane_to_image: np.ndarray,
                 rect: tuple[float, float, float, float], tile: Callable[[int, int], np.ndarray], span: float,
                 texel: tuple[float, float]) -> None:
    """Cover the image polygon ``quad`` with a texture repeated over a plane, in perspective (in place).

    ``plane_to_image`` maps plane metres (a, b, 1) to image px; ``rect`` (a0, a1, b0, b1) is the plane
    area behind ``quad``. ``tile(width, height)`` gives one tile covering ``span x span`` metres at the
    asked size; texels are ``texel`` (a, b) metres, chosen by the caller about one image px each, so
    the texture is neither blurred nor aliased (the depth axis of a plane seen at a grazing angle
    shrinks with distance squared, hence two sizes). The texture starts at the rect's corner, its
    tiles shifted to stay anchored to the world.
    """
    if _pixel_box(canvas, quad) is None:
        return
    tw, th = (int(np.clip(round(span / t), 2, 1024)) for t in texel)
    ta, tb = span / tw, span / th
    a0, b0 = rect[0], rect[2]
    phase = (int(round((a0 % span) / ta)) % tw, int(round((b0 % span) / tb)) % th)
    cols, rows = int(math.ceil((rect[1] - a0) / ta)) + 2, int(math.ceil((rect[3] - b0) / tb)) + 2
    texture = _fill((rows, cols), np.roll(tile(tw, th), (-phase[1], -phase[0]), axis=(0, 1)))
    texture_to_plane = np.array([[ta, 0.0, a0], [0.0, tb, b0], [0.0, 0.0, 1.0]])
    _warp_onto(canvas, quad, texture, plane_to_image @ texture_to_plane)


def _ground_plane(cam: Camera) -> np.ndarray:
    """Homography from ground metres (X, Z, 1) to image px."""
    return np.array([[cam.focal, cam.cx, 0.0], [0.0, cam.horizon, cam.focal * cam.height], [0.0, 1.0, 0.0]])


def _front_plane(cam: Camera, x: float) -> np.ndarray:
    """Homography from metres (Z, Y, 1) on the building front at ``X = x`` to image px."""
    return np.array([[cam.cx, 0.0, cam.focal * x], [cam.horizon, -cam.focal, cam.focal * cam.height],
                     [1.0, 0.0, 0.0]])


def _on_ground(cam: Camera, xz: list[tuple[float, float]]) -> np.ndarray:
    """Image px ``[n, 2]`` of ground points (X, Z)."""
    return np.array([cam.project(x, 0.0, z) for x, z in xz])


def _depth_spans(z0: float, z1: float, ratio: float = 1.5) -> list[tuple[float, float]]:
    """``[z0, z1)`` cut into spans whose far end is at most ``ratio`` times the near end."""
    spans = []
    while z0 < z1:
        spans.append((z0, min(z1, z0 * ratio)))
        z0 *= ratio
    return spans


def _ground(canvas: np.ndarray, cam: Camera, street: Street, look: Look) -> float:
    """Paint road and pavements (gravel-photo asphalt and paving, kerbs, markings, joints); return the near Z.

    Each depth span gets its own resolution of the same tiles, so far ground is not aliased;
    haze is added row by row afterwards (:func:`_haze_rows`).
    """
    H = canvas.shape[0]
    z_near = 0.9 * cam.focal * cam.height / max(1.0, H - cam.horizon)
    z_far = street.z_end
    x_left, x_right = street.front_left - 1.0, street.front_right + 1.0
    plane = _ground_plane(cam)
    looks = np.random.default_rng(street.surface_seed)
    grey = float(looks.uniform(70, 100))
    tone = bgr(jitter_colour(looks, (150, 158, 165), 6))
    asphalt_seed, paving_seed = (int(v) for v in looks.integers(2**31, size=2))
    W = canvas.shape[1]
    for za, zb in _depth_spans(z_near, z_far):
        xa = max(x_left, -cam.cx * zb / cam.focal)
        xb = min(x_right, (W - cam.cx) * zb / cam.focal)
        texel = (za / cam.focal, za * za / (cam.focal * cam.height))
        for a, b, seed, kind, colour, contrast in (
                (xa, xb, paving_seed, "paving", tone, 0.3),
                (max(xa, street.kerb_left), min(xb, street.kerb_right), asphalt_seed, "asphalt",
                 (grey, grey + 2, grey + 4), 0.35)):
            if b <= a:
                continue
            tile = functools.partial(_tinted, np.random.default_rng(seed), kind, colour, contrast)
            _paint_plane(canvas, _on_ground(cam, [(a, za), (b, za), (b, zb), (a, zb)]), plane, (a, b, za, zb), tile,
                         1.5, texel)
    rng = np.random.default_rng(street.surface_seed + 1)
    joint = bgr(jitter_colour(rng, (110, 115, 120), 4))
    slab = float(rng.uniform(0.6, 1.2))
    dash, gap = float(rng.uniform(2.5, 4)), float(rng.uniform(4, 8))
    centre_colour = (30, 190, 220) if rng.random() < 0.3 else (225, 228, 228)
    paint = (225, 228, 228)

    def band(x: float, width: float, za: float, zb: float, colour: tuple[float, float, float]) -> None:
        _fill_quad(canvas, _on_ground(cam, [(x - width / 2, za), (x + width / 2, za), (x + width / 2, zb),
                                            (x - width / 2, zb)]), colour)

    for a, b in ((x_left, street.kerb_left), (street.kerb_right, x_right)):
        for x in np.arange(math.ceil(a / slab) * slab, b, slab):
            band(float(x), 0.04, z_near, z_far, joint)
        z = math.ceil(z_near / slab) * slab
        while z < z_far and cam.focal * cam.height * slab / (z * z) > 3:
            band((a + b) / 2, b - a, z, z + 0.04, joint)
            z += slab
    for x in (street.kerb_left, street.kerb_right):
        band(x, 0.2, z_near, z_far, (175, 178, 180))
    for x in (street.kerb_left + 0.4, street.kerb_right - 0.4):
        band(x, 0.12, z_near, z_far, paint)
    lane = (street.kerb_right - street.kerb_left) / street.lanes
    for k in range(1, street.lanes):
        x = street.kerb_left + k * lane
        if k == street.lanes // 2:
            band(x, 0.15, z_near, z_far, centre_colour)
            continue
        for z in np.arange(z_near - z_near % (dash + gap), z_far, dash + gap):
            band(x, 0.12, max(float(z), z_near), float(z) + dash, paint)
    if street.crossing_z is not None:
        for x in np.arange(street.kerb_left + 0.55, street.kerb_right - 0.3, 1.0):
            band(float(x), 0.5, street.crossing_z, street.crossing_z + 4, paint)
    return z_near


def _haze_rows(canvas: np.ndarray, cam: Camera, z_near: float, z_far: float, look: Look) -> None:
    """Blend the ground rows towards the haze colour by their distance (one LUT per band of equal haze)."""
    H = canvas.shape[0]
    top = int(math.floor(cam.horizon + cam.focal * cam.height / z_far))
    rows = np.arange(max(0, top), H)
    if rows.size == 0:
        return
    z = cam.focal * cam.height / np.maximum(rows + 0.5 - cam.horizon, 1e-3)
    steps = np.rint(_haze(np.minimum(z, z_far), look.visibility) * 64).astype(np.int64)
    edges = np.concatenate([[0], np.flatnonzero(np.diff(steps)) + 1, [len(steps)]])
    levels = np.arange(256, dtype=np.float32)[:, None]
    for a, b in zip(edges[:-1], edges[1:]):
        weight = np.float32(steps[a] / 64)
        if weight == 0:
            continue
        lut = np.clip(levels * (1 - weight) + look.haze[None, :] * weight, 0, 255).astype(np.uint8)
        r0, r1 = int(rows[a]), int(rows[b - 1]) + 1
        canvas[r0:r1] = cv2.LUT(canvas[r0:r1], lut.reshape(1, 256, 3))


def _front_points(cam: Camera, x: float, z: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Image px ``[..., 2]`` of points (``z``, ``y``) on the building front at ``X = x`` (arrays broadcast)."""
    z, y = np.broadcast_arrays(np.asarray(z, dtype=np.float64), np.asarray(y, dtype=np.float64))
    return np.stack([cam.cx + cam.focal * x / z, cam.horizon + cam.focal * (cam.height - y) / z], axis=-1)


def _fill_quads(canvas: np.ndarray, quads: np.ndarray, colour: tuple[float, float, float]) -> None:
    """Fill image polygons ``quads [n, k, 2]`` (float px) in one colour, skipping those outside the image."""
    H, W = canvas.shape[:2]
    lo, hi = quads.min(axis=1), quads.max(axis=1)
    seen = (hi[:, 0] >= 0) & (lo[:, 0] < W) & (hi[:, 1] >= 0) & (lo[:, 1] < H)
    if seen.any():
        cv2.fillPoly(canvas, list(np.rint(quads[seen] * 4).astype(np.int32)), colour, cv2.LINE_AA, 2)


def _building(canvas: np.ndarray, cam: Camera, x: float, b: Building, z_near: float, z_far: float, look: Look,
              mirror: bool) -> None:
    """Paint one building front: tinted photo wall, cornice, windows (some lit when dim), shop front, posters."""
    za, zb = max(b.z0, z_near), min(b.z1, z_far)
    if zb <= za:
        return
    plane = _front_plane(cam, x)
    span = 2.5 if b.material == "brick" else 4.0
    contrast = 0.5 if b.material == "brick" else 0.25
    for z0, z1 in _depth_spans(za, zb):
        top = min(b.height, cam.height + cam.horizon * z1 / cam.focal)
        quad = _front_points(cam, x, np.array([z0, z1, z1, z0]), np.array([0.0, 0.0, top, top]))
        colour = _fog(b.colour, (z0 + z1) / 2, look)
        if np.ptp(quad[:, 0]) < 12:          # too thin on screen for a texture to show
            _fill_quad(canvas, quad, colour)
            continue
        tile = functools.partial(_tinted, np.random.default_rng(b.seed), b.material, colour, contrast)
        _paint_plane(canvas, quad, plane, (z0, z1, 0.0, top), tile, span,
                     (z0 * z0 / (cam.focal * abs(x)), z0 / cam.focal))
    mid = (za + zb) / 2
    _fill_quad(canvas, _front_points(cam, x, np.array([za, zb, zb, za]), b.height - np.array([0.35, 0.35, 0, 0])),
               _fog(np.asarray(b.colour) * 0.6, mid, look))
    rng = np.random.default_rng(b.seed + 1)
    ww, wh, spacing = b.window
    zs = np.arange(b.z0 + 1.2, b.z1 - ww - 0.8, spacing)
    ys = np.arange(3.8 if b.shop else 0.9, b.height - wh - 0.4, b.floor)
    tones = [_fog(np.array([70, 62, 55]) * rng.uniform(0.6, 1.3), mid, look) for _ in range(3)]
    kind = rng.integers(0, 3, (len(ys), len(zs)))
    if look.dim:
        kind[rng.random(kind.shape) < 0.3] = 3
    tones.append(_fog((120, 200, 250), mid, look))
    keep = (zs >= za) & (zs + ww <= zb) & (cam.focal * ww / np.maximum(zs, 1e-3) >= 1.5)
    if keep.any() and len(ys):
        z_grid, y_grid = np.meshgrid(zs[keep], ys)
        kind = kind[:, keep]
        corners_z = np.array([0.0, ww, ww, 0.0])
        corners_y = np.array([0.0, 0.0, wh, wh])
        frames = _front_points(cam, x, z_grid[..., None] + corners_z, y_grid[..., None] + corners_y)
        inset = np.array([0.07, -0.07, -0.07, 0.07])
        panes = _front_points(cam, x, z_grid[..., None] + corners_z + inset, y_grid[..., None] + corners_y +
                              inset[[0, 0, 1, 1]])
        _fill_quads(canvas, frames.reshape(-1, 4, 2), _fog((215, 215, 215), mid, look))
        for k, tone in enumerate(tones):
            _fill_quads(canvas, panes[kind == k], tone)
    if not b.shop:
        return
    board = one_of(rng, [(40, 40, 40), (120, 60, 20), (30, 30, 150), (40, 110, 40)], 10)
    b0, b1 = max(za, b.z0 + 0.3), min(zb, b.z1 - 0.3)
    if b1 > b0:
        _fill_quad(canvas, _front_points(cam, x, np.array([b0, b1, b1, b0]), np.array([3.0, 3.0, 3.6, 3.6])),
                   _fog(board, mid, look))
    for z in np.arange(b.z0 + 0.8, b.z1 - 2.5, float(rng.uniform(2.5, 4.0))):
        poster = rng.random() < 0.55
        seed = int(rng.integers(2**31))
        if z < za or z + 2.0 > zb:
            continue
        _fill_quad(canvas, _front_points(cam, x, z + np.array([0.0, 2.0, 2.0, 0.0]), np.array([0.4, 0.4, 2.7, 2.7])),
                   _fog((45, 40, 38), z, look))
        corners = _front_points(cam, x, z + np.array([0.4, 1.6, 1.6, 0.4]), np.array([0.85, 0.85, 2.25, 2.25]))
        width, height = np.ptp(corners[:, 0]), np.ptp(corners[:, 1])
        if poster and min(width, height) >= 4:
            photo = _poster(np.random.default_rng(seed), int(max(8, width)), int(max(8, height)))
            _paste_photo(canvas, corners if not mirror else corners[[1, 0, 3, 2]], look.seen(photo, z))


def _paste_photo(canvas: np.ndarray, corners: np.ndarray, photo: np.ndarray) -> None:
    """Warp ``photo`` onto the image quadrilateral ``corners`` (bottom-left, bottom-right, top-right, top-left)."""
    ph, pw = photo.shape[:2]
    src = np.array([[0, ph], [pw, ph], [pw, 0], [0, 0]], np.float32)
    _warp_onto(canvas, corners, photo, cv2.getPerspectiveTransform(src, corners.astype(np.float32)))


def _facades(canvas: np.ndarray, cam: Camera, street: Street, look: Look) -> None:
    """Paint both rows of building fronts, far buildings first."""
    W = canvas.shape[1]
    for side, x in (("left", street.front_left), ("right", street.front_right)):
        edge = cam.cx if side == "left" else W - cam.cx
        z_enter = max(0.5, 0.9 * cam.focal * abs(x) / max(edge, 1.0))
        for b in reversed(street.buildings[side]):
            _building(canvas, cam, x, b, z_enter, street.z_end, look, side == "right")


def _sky(rng: np.random.Generator, width: int, height: int, horizon: float, dim: bool) -> np.ndarray:
    """Sky ``uint8 [H, W, 3]``: a vertical gradient with soft clouds, bluer towards the top (made small, resized)."""
    w, h = max(2, width // 8), max(2, height // 8)
    low = np.array([205, 200, 190] if not dim else [150, 120, 100], np.float32) * np.float32(rng.uniform(0.9, 1.05))
    high = np.array([200, 150, 100] if rng.random() < 0.6 else [175, 170, 165], np.float32)
    t = np.clip(1 - (np.arange(h, dtype=np.float32) + 0.5) * 8 / max(horizon, 1.0), 0, 1)[:, None, None]
    sky = low[None, None, :] * (1 - t) + high[None, None, :] * t
    clouds = cv2.resize(rng.random((4, 7), dtype=np.float32), (w, h), interpolation=cv2.INTER_CUBIC)
    sky = np.clip(sky + (np.float32(rng.uniform(10, 35)) * clouds)[:, :, None], 0, 255).astype(np.uint8)
    return cv2.resize(sky, (width, height), interpolation=cv2.INTER_LINEAR)


def _far_end(rng: np.random.Generator, canvas: np.ndarray, cam: Camera, street: Street, look: Look) -> None:
    """The buildings closing the street far away: a hazy skyline between the two rows of fronts."""
    z = street.z_end
    x = street.front_left
    while x < street.front_right:
        width, height = float(rng.uniform(6, 20)), float(rng.uniform(8, 40))
        (a, top), (b, bottom) = cam.project(x, height, z), cam.project(min(x + width, street.front_right), 0.0, z)
        colour = _fog(jitter_colour(rng, (150, 155, 160), 20), z, look)
        cv2.rectangle(canvas, (int(a), int(top)), (int(math.ceil(b)), int(math.ceil(bottom))), colour, -1)
        x += width


def _background(rng: np.random.Generator, width: int, height: int, cam: Camera, street: Street,
                look: Look) -> np.ndarray:
    """Background ``uint8 [H, W, 3]`` at the full image size, made at most BACKGROUND_MAX_SIDE and resized."""
    k = min(1.0, BACKGROUND_MAX_SIDE / max(width, height))
    w, h = max(1, int(round(width * k))), max(1, int(round(height * k)))
    small = cam.scaled(k)
    canvas = _sky(rng, w, h, small.horizon, look.dim)
    z_near = _ground(canvas, small, street, look)
    _haze_rows(canvas, small, z_near, street.z_end, look)
    _far_end(rng, canvas, small, street, look)
    _facades(canvas, small, street, look)
    canvas = cv2.multiply(canvas, look.gain_image(w, h), scale=1 / 128)
    if (w, h) == (width, height):
        return canvas
    return cv2.resize(canvas, (width, height), interpolation=cv2.INTER_LINEAR)


#: Drawing of each class, by look-alike group.
_BUILDERS: dict[str, Callable[[np.random.Generator, float, str, str], Thing]] = {
    name: BUILDERS[group] for _, name, group in CATEGORIES}
#: Rough (width, height) in metres of each group, for choosing distances at which it stays drawable.
_NOMINAL_SIZE: dict[str, tuple[float, float]] = {
    "car_like": (1.8, 1.5), "large_vehicle": (2.5, 3.2), "two_wheeler": (1.7, 1.0), "person": (0.45, 1.5),
    "traffic_light": (0.34, 0.95), "round_sign": (0.65, 0.65), "street_furniture": (0.4, 0.9)}


# --------------------------------------------------------------------------------------------------
# Layout: where each object stands in the street, then what is visible of it in the image.


@dataclass
class Spot:
    """One thing to place: class (-1 for a tree), world position, view, and whether it belongs to a crowd."""

    category: int
    x: float
    z: float
    view: str
    in_group: bool = False


def _distance(rng: np.random.Generator, cam: Camera, street: Street, category: int, near: float) -> float:
    """A distance (m) drawn log-uniformly between ``near`` and the farthest one at which the class is drawable."""
    w, h = _NOMINAL_SIZE[CATEGORIES[category][2]]
    far = min(street.z_end - 5.0, cam.focal * min(w, h) / MIN_SIDE_PX, cam.focal * max(w, h) / MIN_LONG_PX)
    lo = min(near, far * 0.5)
    return float(math.exp(rng.uniform(math.log(lo), math.log(far))))


def _free_spot(rng: np.random.Generator, cam: Camera, street: Street, category: int, near: float,
               width: int) -> Spot:
    """Where a free-standing object of ``category`` stands: vehicles in lanes, people on pavements, ...

    With TRUNCATED_RATE the object is moved sideways onto the left or right image border (if that
    point of the street is between the building fronts), so that part of it is cut off.
    """
    spot = _street_spot(rng, street, category, _distance(rng, cam, street, category, near))
    edge, shift, depth = float(rng.choice([0.0, float(width)])), float(rng.uniform(-0.25, 0.3)), float(rng.random())
    if rng.random() < TRUNCATED_RATE:
        side = street.front_left + 0.3 if edge == 0 else street.front_right - 0.3
        farthest = min(spot.z, cam.focal * side / (edge - cam.cx)) if side * (edge - cam.cx) > 0 else 0.0
        if farthest > near:
            spot.z = float(near * (farthest / near) ** depth)
            reach = _NOMINAL_SIZE[CATEGORIES[category][2]][0] * (2.5 if spot.view == "side" else 1.0)
            spot.x = (edge - cam.cx) * spot.z / cam.focal + (shift * reach if edge > 0 else -shift * reach)
    return spot


def _street_spot(rng: np.random.Generator, street: Street, category: int, z: float) -> Spot:
    """Position across the street and view of an object of ``category`` at distance ``z``."""
    group = CATEGORIES[category][2]
    lanes = street.lane_centres()
    right = bool(rng.random() < 0.5)
    pavement = (street.kerb_right + 0.3, street.front_right - 0.6) if right else (street.front_left + 0.6,
                                                                                  street.kerb_left - 0.3)
    kerb, outward = (street.kerb_right + 0.4, 1.0) if right else (street.kerb_left - 0.4, -1.0)
    if group in ("car_like", "large_vehicle"):
        roll = rng.random()
        if NAMES[category] == "tram":
            x, view = float(lanes[len(lanes) // 2] - 1.6 + rng.normal(0, 0.2)), str(rng.choice(["rear", "front"]))
        elif roll < 0.12:
            x, view = float(rng.uniform(street.kerb_left, street.kerb_right)), "side"
        elif roll < 0.3:
            x, view = kerb - outward * 1.5, str(rng.choice(["rear", "front"]))
        else:
            k = int(rng.integers(len(lanes)))
            x, view = float(lanes[k] + rng.normal(0, 0.25)), "front" if k < len(lanes) / 2 else "rear"
        return Spot(category, x, z, view)
    if group == "two_wheeler":
        x = kerb + outward * 0.2 if rng.random() < 0.6 else kerb - outward * 1.2
        return Spot(category, x, z, "side")
    if group == "person":
        if rng.random() < 0.1:
            return Spot(category, float(rng.uniform(street.kerb_left, street.kerb_right)), z, "side")
        return Spot(category, float(rng.uniform(*pavement)), z, str(rng.choice(["front", "side"], p=[0.7, 0.3])))
    if group == "traffic_light":
        if rng.random() < 0.25:
            return Spot(category, float(rng.choice(lanes)), z, "overhead")
        return Spot(category, kerb, z, "pole")
    if group == "round_sign":
        return Spot(category, kerb, z, "front")
    if NAMES[category] == "traffic_cone" and rng.random() < 0.5:
        return Spot(category, float(rng.uniform(street.kerb_left + 0.3, street.kerb_right - 0.3)), z, "front")
    x = kerb + outward * 0.5 * float(rng.random()) if rng.random() < 0.7 else float(rng.uniform(*pavement))
    return Spot(category, x, z, "front")


def _pick(rng: np.random.Generator, members: tuple[str, ...]) -> int:
    """A class index drawn from ``members`` in proportion to class frequency."""
    p = np.array([CLASS_FREQUENCY[m] for m in members], dtype=np.float64)
    return _INDEX[members[int(rng.choice(len(members), p=p / p.sum()))]]


def _crowd(rng: np.random.Generator, cam: Camera, street: Street, near: float) -> list[Spot]:
    """One crowd: people on a crossing, a queue of vehicles, a row of parked two-wheelers or a cone line."""
    kind = str(rng.choice(["people", "queue", "parked", "cones"], p=[0.4, 0.3, 0.2, 0.1]))
    spots: list[Spot] = []
    if kind == "people":
        z = street.crossing_z + 2 if street.crossing_z is not None else _distance(rng, cam, street, _INDEX["car"], near)
        side = rng.random() < 0.5
        lo, hi = ((street.kerb_left - 2.5, street.kerb_left + 1.0) if side else
                  (street.kerb_right - 1.0, street.kerb_right + 2.5))
        for _ in range(int(rng.integers(5, 13))):
            spots.append(Spot(_pick(rng, LOOKALIKE_GROUPS["person"]), float(rng.uniform(lo, hi)),
                              float(z + rng.normal(0, 1.5)), str(rng.choice(["front", "side"])), True))
    elif kind == "queue":
        lanes = street.lane_centres()
        k = int(rng.integers(len(lanes)))
        z = _distance(rng, cam, street, _INDEX["car"], near)
        for _ in range(int(rng.integers(4, 9))):
            members = LOOKALIKE_GROUPS["car_like"] if rng.random() < 0.85 else ("bus", "truck")
            spots.append(Spot(_pick(rng, members), float(lanes[k] + rng.normal(0, 0.2)), z,
                              "front" if k < len(lanes) / 2 else "rear", True))
            z += float(rng.uniform(5.5, 9.0))
    elif kind == "parked":
        x = street.kerb_left - 0.8 if rng.random() < 0.5 else street.kerb_right + 0.8
        z = _distance(rng, cam, street, _INDEX["bicycle"], near)
        for _ in range(int(rng.integers(3, 8))):
            spots.append(Spot(_pick(rng, LOOKALIKE_GROUPS["two_wheeler"]), x + float(rng.normal(0, 0.1)), z,
                              "side", True))
            z += float(rng.uniform(0.6, 1.1))
    else:
        x = street.kerb_left + 0.6 if rng.random() < 0.5 else street.kerb_right - 0.6
        z = _distance(rng, cam, street, _INDEX["traffic_cone"], near)
        for _ in range(int(rng.integers(4, 9))):
            spots.append(Spot(_INDEX["traffic_cone"], x + float(rng.normal(0, 0.15)), z, "front", True))
            z += float(rng.uniform(1.5, 3.5))
    return spots


@dataclass
class Drawn:
    """A thing placed in the image: its drawing, ground point, spot, px per metre, record and silhouette."""

    thing: Thing
    centre: tuple[int, int]
    spot: Spot
    scale: float
    placed: Placed | None           # None for a tree
    mask: np.ndarray                # silhouette, bool, its top-left pixel at centre + corner
    corner: tuple[int, int]


def _bounds(ops: list[Op]) -> tuple[int, int, int, int]:
    """Integer (x0, y0, x1, y1) holding every pixel ``ops`` draw, in local px."""
    lo, hi = np.array([np.inf, np.inf]), np.array([-np.inf, -np.inf])
    for op in ops:
        pad = (op.thickness / 2 if op.thickness > 0 else 0.0) + op.radius + 1.0
        lo = np.minimum(lo, op.points.min(0) - pad)
        hi = np.maximum(hi, op.points.max(0) + pad)
    return int(math.floor(lo[0])), int(math.floor(lo[1])), int(math.ceil(hi[0])) + 1, int(math.ceil(hi[1])) + 1


def _silhouette(ops: list[Op]) -> tuple[np.ndarray, int, int]:
    """Boolean mask of ``ops`` (inner ops skipped) and the local px of its top-left pixel."""
    x0, y0, x1, y1 = _bounds(ops)
    canvas = np.zeros((y1 - y0, x1 - x0), np.uint8)
    draw(canvas, ops, (-x0, -y0), mask=True)
    return canvas > 0, x0, y0


class Occupancy:
    """Who is seen at each pixel (index of the placed object, -1 for background and trees)."""

    def __init__(self, width: int, height: int) -> None:
        self.width, self.height = width, height
        self.owner = np.full((height, width), -1, dtype=np.int16)
        self.placed: list[Placed] = []
        self.visible: list[int] = []

    def window(self, mask: np.ndarray, left: int, top: int) -> tuple[slice, slice, np.ndarray] | None:
        """Image rows, cols and the part of ``mask`` inside the image, or None if nothing is inside."""
        r0, c0 = max(0, top), max(0, left)
        r1, c1 = min(self.height, top + mask.shape[0]), min(self.width, left + mask.shape[1])
        if r1 <= r0 or c1 <= c0:
            return None
        return slice(r0, r1), slice(c0, c1), mask[r0 - top:r1 - top, c0 - left:c1 - left]

    def covers_too_much(self, rows: slice, cols: slice, inside: np.ndarray) -> bool:
        """Whether drawing over ``inside`` would leave an earlier object less visible than it must stay."""
        hidden = self.owner[rows, cols][inside]
        hidden = hidden[hidden >= 0]
        if hidden.size == 0:
            return False
        counts = np.bincount(hidden, minlength=len(self.placed))
        for j in np.nonzero(counts)[0]:
            if self.visible[j] - counts[j] < self.placed[j].min_visible * self.placed[j].in_pixels:
                return True
        return False

    def take(self, rows: slice, cols: slice, inside: np.ndarray, index: int) -> None:
        """Mark ``inside`` as seen from object ``index`` (-1: an unlabelled occluder)."""
        region = self.owner[rows, cols]
        hidden = region[inside]
        hidden = hidden[hidden >= 0]
        if hidden.size:
            for j, n in enumerate(np.bincount(hidden, minlength=len(self.placed))):
                self.visible[j] -= int(n)
        region[inside] = index


def _place(rng: np.random.Generator, spots: list[Spot], cam: Camera, occupancy: Occupancy) -> list[Drawn]:
    """Build and place ``spots`` far to near; keep those inside the image, large enough and not hiding others."""
    drawn: list[Drawn] = []
    for spot in sorted(spots, key=lambda sp: -sp.z):
        s = cam.focal / spot.z
        gx, gy = cam.project(spot.x, 0.0, spot.z)
        centre = (int(round(gx)), int(round(gy)))
        if spot.category < 0:
            thing = tree(rng, s)
        else:
            name = NAMES[spot.category]
            thing = _BUILDERS[name](rng, s, name, spot.view)
        mask, lx, ly = _silhouette(thing.ops)
        win = occupancy.window(mask, centre[0] + lx, centre[1] + ly)
        if win is None:
            continue
        rows, cols, inside = win
        in_pixels, full = int(inside.sum()), int(mask.sum())
        if in_pixels == 0 or occupancy.covers_too_much(rows, cols, inside):
            continue
        if spot.category < 0:
            occupancy.take(rows, cols, inside, -1)
            drawn.append(Drawn(thing, centre, spot, s, None, mask, (lx, ly)))
            continue
        ys, xs = np.nonzero(inside)
        bw, bh = int(xs.max() - xs.min() + 1), int(ys.max() - ys.min() + 1)
        if in_pixels < MIN_IN_IMAGE * full or min(bw, bh) < MIN_SIDE_PX or max(bw, bh) < MIN_LONG_PX:
            continue
        props = None
        if thing.props:                      # a pole or an arm hides what is behind it, unlabelled
            pole, pole_x, pole_y = _silhouette(thing.props)
            props = occupancy.window(pole, centre[0] + pole_x, centre[1] + pole_y)
            if props is not None and occupancy.covers_too_much(*props):
                continue
        if props is not None:
            occupancy.take(*props, -1)
        bbox = (float(cols.start + xs.min()), float(rows.start + ys.min()), float(bw), float(bh))
        placed = Placed(spot.category, thing.ops, centre, bw * bh < 32 * 32, spot.in_group,
                        GROUP_MIN_VISIBLE if spot.in_group else FREE_MIN_VISIBLE, full, in_pixels, 0, bbox)
        occupancy.take(rows, cols, inside, len(occupancy.placed))
        occupancy.placed.append(placed)
        occupancy.visible.append(in_pixels)
        drawn.append(Drawn(thing, centre, spot, s, placed, mask, (lx, ly)))
    for placed, visible in zip(occupancy.placed, occupancy.visible):
        placed.visible_pixels = visible
    return drawn


@dataclass
class Layout:
    """One image: size, camera, street, light, conditions and the things placed, far to near."""

    width: int
    height: int
    camera: Camera
    street: Street
    look: Look
    conditions: dict[str, bool]
    drawn: list[Drawn]


def image_size(rng: np.random.Generator) -> tuple[int, int]:
    """(width, height) drawn from IMAGE_SIZES, turned upright with PORTRAIT_RATE."""
    p = np.array([w for _, _, w in IMAGE_SIZES])
    width, height, _ = IMAGE_SIZES[int(rng.choice(len(IMAGE_SIZES), p=p / p.sum()))]
    return (height, width) if rng.random() < PORTRAIT_RATE else (width, height)


def layout(rng: np.random.Generator, max_side: int | None = None) -> Layout:
    """Draw one image's size, camera, street, light, conditions and objects, and place the objects.

    Frames larger than 1000 px get up to FAR_OBJECTS_PER_1000_PX extra far objects per further
    1000 px of their long side (a sharper camera sees farther). ``max_side`` shrinks the image
    (same scene; objects that become too small to draw are left out).
    """
    width, height = image_size(rng)
    long_side = max(width, height)
    conditions = {k: bool(rng.random() < p) for k, p in IMAGE_CONDITION_RATES.items()}
    cam = _camera(rng, width, height)
    if max_side is not None and long_side > max_side:
        k = max_side / long_side
        width, height, cam = int(round(width * k)), int(round(height * k)), cam.scaled(k)
    street = _street(rng)
    look = _look(rng, conditions["dim"])
    near = max(3.0, 0.9 * cam.focal * cam.height / (height - cam.horizon))
    spots = [_free_spot(rng, cam, street, int(rng.choice(len(NAMES), p=_DRAW_P)), near, width)
             for _ in range(int(rng.integers(6, 26)))]
    far = int(rng.integers(0, int(FAR_OBJECTS_PER_1000_PX * max(0.0, long_side / 1000 - 1)) + 1))
    spots += [_free_spot(rng, cam, street, int(rng.choice(len(NAMES), p=_DRAW_P)), FAR_FROM, width)
              for _ in range(far)]
    if conditions["crowded"]:
        spots += _crowd(rng, cam, street, near)
    for _ in range(int(rng.integers(0, 7))):
        side = rng.random() < 0.5
        x = street.front_left + 1.2 if side else street.front_right - 1.2
        spots.append(Spot(-1, x, float(rng.uniform(near, min(80.0, street.z_end))), "front"))
    occupancy = Occupancy(width, height)
    drawn = _place(rng, spots, cam, occupancy)
    return Layout(width, height, cam, street, look, conditions, drawn)


# --------------------------------------------------------------------------------------------------
# Rendering: background, then each thing far to near (shadow, pole, body, advert), then lens and sensor.


def _seen(ops: list[Op], look: Look, z: float, rel: tuple[float, float]) -> list[Op]:
    """``ops`` with colours as seen at distance ``z`` and relative image position ``rel``."""
    return [Op(op.kind, op.points, look.colour(op.colour, z, *rel), op.thickness, op.radius, op.inner) for op in ops]


def _shadow(image: np.ndarray, item: Drawn, cam: Camera) -> None:
    """A soft dark ellipse on the ground under a standing object (contact shadow)."""
    x0, _, x1, _ = _bounds(item.thing.ops)
    half_w = max(1, int(0.5 * (x1 - x0)))
    half_h = max(1, int(round(item.scale * cam.height * 0.6 / item.spot.z)))
    cx, cy = item.centre
    r0, r1 = max(0, cy - 2 * half_h), min(image.shape[0], cy + 2 * half_h + 1)
    c0, c1 = max(0, cx - half_w - 2), min(image.shape[1], cx + half_w + 3)
    if r1 <= r0 or c1 <= c0:
        return
    shade = np.zeros((r1 - r0, c1 - c0), np.uint8)
    cv2.ellipse(shade, (cx - c0, cy - r0), (half_w, half_h), 0, 0, 360, 255, -1, cv2.LINE_AA)
    region = image[r0:r1, c0:c1]
    region[:] = (region * (1 - 0.45 / 255 * shade[:, :, None].astype(np.float32))).astype(np.uint8)


def _paste_patch(rng: np.random.Generator, image: np.ndarray, item: Drawn, look: Look,
                 rel: tuple[float, float]) -> None:
    """Paste a poster photo into the thing's patch rectangle (a bus or tram advert), clipped to the image."""
    x0, y0, x1, y1 = item.thing.patch
    left, top = item.centre[0] + int(round(x0)), item.centre[1] + int(round(y0))
    w, h = int(round(x1 - x0)), int(round(y1 - y0))
    if w < 2 or h < 2:
        return
    photo = look.seen(_poster(rng, w, h), item.spot.z, look.gain(*rel))
    r0, c0 = max(0, top), max(0, left)
    r1, c1 = min(image.shape[0], top + h), min(image.shape[1], left + w)
    if r1 > r0 and c1 > c0:
        image[r0:r1, c0:c1] = photo[r0 - top:r1 - top, c0 - left:c1 - left]


def _paint_tree(rng: np.random.Generator, image: np.ndarray, item: Drawn, look: Look,
                rel: tuple[float, float]) -> None:
    """Draw a tree: trunk as a line, crown filled with a tinted patch of the grass photo."""
    trunk, *discs = item.thing.ops
    draw(image, _seen([trunk], look, item.spot.z, rel), item.centre)
    mask, lx, ly = _silhouette(discs)
    left, top = item.centre[0] + lx, item.centre[1] + ly
    r0, c0 = max(0, top), max(0, left)
    r1, c1 = min(image.shape[0], top + mask.shape[0]), min(image.shape[1], left + mask.shape[1])
    if r1 <= r0 or c1 <= c0:
        return
    green = look.colour(tuple(jitter_colour(rng, (50, 105, 60), 10)), item.spot.z, *rel)
    leaves = _tinted(rng, "grass", green, 0.7, max(4, min(512, int(mask.shape[1] / 2) + 1)))
    leaves = _fill(mask.shape, leaves)
    sub = mask[r0 - top:r1 - top, c0 - left:c1 - left]
    np.copyto(image[r0:r1, c0:c1], leaves[r0 - top:r1 - top, c0 - left:c1 - left], where=sub[:, :, None])


def _grain(rng: np.random.Generator, image: np.ndarray, item: Drawn) -> None:
    """Give a drawn object's pixels a little photo grain (gravel photo) and light from above (in place)."""
    h, w = item.mask.shape
    if h * w < 64:
        return
    left, top = item.centre[0] + item.corner[0], item.centre[1] + item.corner[1]
    r0, c0 = max(0, top), max(0, left)
    r1, c1 = min(image.shape[0], top + h), min(image.shape[1], left + w)
    if r1 <= r0 or c1 <= c0:
        return
    grey = _photo("gravel", 1)[:, :, 0]
    dy, dx = (int(v) for v in rng.integers(0, grey.shape[0] // 2, 2))
    grain = _fill((h, w), grey[dy:, dx:, None])[r0 - top:r1 - top, c0 - left:c1 - left, 0]
    light = np.linspace(1.08, 0.9, h, dtype=np.float32)[r0 - top:r1 - top, None]
    factor = light * (1 + np.float32(0.07 / 128) * (grain.astype(np.float32) - np.float32(grey.mean())))
    inside = item.mask[r0 - top:r1 - top, c0 - left:c1 - left]
    region = image[r0:r1, c0:c1]
    region[inside] = np.clip(region[inside] * factor[inside][:, None], 0, 255).astype(np.uint8)


def _render(rng: np.random.Generator, scene: Layout) -> tuple[np.ndarray, dict[str, float]]:
    """Pixels ``uint8 [H, W, 3]`` BGR of a laid-out image, and the strength of each image condition."""
    W, H = scene.width, scene.height
    image = _background(rng, W, H, scene.camera, scene.street, scene.look)
    for item in scene.drawn:
        rel = (item.centre[0] / W, item.centre[1] / H)
        if item.placed is None:
            _paint_tree(rng, image, item, scene.look, rel)
            continue
        if item.spot.view not in ("pole", "overhead") and CATEGORIES[item.spot.category][2] != "round_sign":
            _shadow(image, item, scene.camera)
        draw(image, _seen(item.thing.props + item.thing.ops, scene.look, item.spot.z, rel), item.centre)
        _grain(rng, image, item)
        if item.thing.patch is not None:
            _paste_patch(rng, image, item, scene.look, rel)
    long_side = max(W, H)
    blur_sigma = float(rng.uniform(0.8, 2.0) * long_side / 1000) if scene.conditions["blur"] else 0.0
    if blur_sigma:
        image = cv2.GaussianBlur(image, (0, 0), blur_sigma)
    noise_sigma = float(rng.uniform(5, 9)) if scene.conditions["dim"] else float(rng.uniform(1.0, 2.5))
    tile = np.clip(rng.standard_normal((256, 256, 3), dtype=np.float32) * noise_sigma + 128, 0, 255).astype(np.uint8)
    image = cv2.addWeighted(image, 1.0, _fill((H, W), tile), 1.0, -128.0)
    strength = {"blur_sigma": round(blur_sigma, 3), "light_gain": round(scene.look.light, 3),
                "noise_sigma": round(noise_sigma, 3)}
    return image, strength


def generate(out_dir: str | Path, *, num_images: int = 800, seed: int = 0, max_side: int | None = None,
             fault_rates: dict[str, float] | None = None, progress: bool = True) -> DemoPaths:
    """Draw the street-camera scenario and write it as a COCO dataset with planted label faults.

    Parameters
    ----------
    out_dir : folder to write ``annotations.json`` (COCO, faults included), ``images/street_*.jpg`` and
        ``truth.json`` (clean objects, image conditions, planted faults; see ``demo/README.md``).
    num_images : how many images to draw.
    seed : everything (sizes, pixels, ids, faults) follows from it; the same seed writes the same bytes.
    max_side : shrink every image so its longest side is at most this (for quick tests; the scene is
        the same, only smaller). None keeps the real sizes, 640 to 4000 px.
    fault_rates : share of objects for each fault kind, keys among ``wrong_class``, ``missing_box``,
        ``loose_box``, ``duplicate_box``; missing keys keep :data:`FAULT_RATES` (5%, 5%, 5%, 1%).
    progress : show a tqdm bar while drawing.

    Returns
    -------
    DemoPaths with the three paths written.
    """
    if num_images < 1:
        raise ValueError(f"generate_demo: num_images must be at least 1, got {num_images}")
    if max_side is not None and max_side < 256:
        raise ValueError(f"generate_demo: max_side must be at least 256 px, got {max_side}")
    rates = check_fault_rates({**FAULT_RATES, **(fault_rates or {})})
    out_dir = Path(out_dir)
    images_dir = out_dir / "images"
    images_dir.mkdir(parents=True, exist_ok=True)

    streams = spawn_streams(seed, num_images)
    ids = image_ids(streams.ids, num_images)
    objects: list[dict[str, Any]] = []
    image_records: list[dict[str, Any]] = []
    for k in tqdm(range(num_images), desc="street images", unit="img", disable=not progress):
        rng = np.random.default_rng(streams.images[k])
        scene = layout(rng, max_side)
        pixels, strength = _render(rng, scene)
        file_name = f"street_{ids[k]:05d}.jpg"
        write_image(images_dir, file_name, pixels, JPEG_QUALITY)
        cam = scene.camera
        image_records.append({"image_id": ids[k], "file_name": file_name, "width": scene.width,
                              "height": scene.height, **scene.conditions, **strength,
                              "horizon_row": round(cam.horizon, 1), "focal_px": round(cam.focal, 1),
                              "camera_height_m": round(cam.height, 2)})
        for item in scene.drawn:
            if item.placed is not None:
                objects.append({**object_record(item.placed, ids[k]), "distance_m": round(item.spot.z, 2),
                                "view": item.spot.view})
    remove_stale_images(images_dir, "street_*.jpg", {r["file_name"] for r in image_records})
    return write_dataset(out_dir, scenario=SCENARIO, seed=seed, streams=streams, categories=CATEGORIES,
                         confusions=CONFUSIONS, images=image_records, objects=objects, rates=rates)
