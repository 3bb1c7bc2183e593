"""The aerial scenario: a drone looking straight down on a marina, its quay, a road and a car park.

A second drawn scene, unlike the warehouse table in every way an audit recipe could have been tuned
to: images of mixed sizes and aspect ratios (1024 x 768, 1280 x 720, 1600 x 900, portrait 960 x 1280),
a ground resolution drawn per image (3-10.5 px per metre), fifteen long-tailed classes in look-alike
groups (sedan / hatchback / estate, van / box truck / bus, shipping container / trailer, motorboat /
sailboat / dinghy, kayak / canoe / jet ski, and the motorcycle), objects from about 6 px to about 150 px,
parked rows and moored boats side by side (touching, some overlapping), truncation at every border,
clutter that is not an object (bay and road markings, trees over the cars, buoys, bollards, lamp posts,
pallets, building roofs, shadows), blur and dim light. The whole layout is turned by a random angle
and sometimes mirrored, so the data has no preferred direction, as a nadir view should.

Label faults are planted by :mod:`detdiff.data.scenarios.faults` with a wrong class drawn in
proportion to class frequency within the object's look-alike group and loose boxes of IoU 0.55-0.80.
``demo/README.md`` documents the scene; the seeding contract is that of the faults module.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import cv2
import numpy as np

from detdiff.data.scenarios.drawing import (
    Op, Scene, draw, jitter_colour, light_and_lens, local_mask, object_record, put_object, put_occluder, rect,
    rounded_rect, settle_visibility, shade)
from detdiff.data.scenarios.faults import (
    HELD_OUT_FAULT_RATES, DemoPaths, LooseBoxes, check_fault_rates, draw_images, look_alike_confusions,
    write_dataset)

SCENARIO = "marina, quay, road and car park seen from a drone looking straight down"

#: (COCO id, name, supercategory). Ids are not contiguous and do not start at 0 or 1.
CATEGORIES: tuple[tuple[int, str, str], ...] = (
    (2, "sedan", "car"),
    (5, "hatchback", "car"),
    (6, "estate", "car"),
    (9, "van", "large_vehicle"),
    (13, "box_truck", "large_vehicle"),
    (14, "bus", "large_vehicle"),
    (17, "motorcycle", "two_wheeler"),
    (21, "shipping_container", "cargo"),
    (22, "trailer", "cargo"),
    (30, "motorboat", "boat"),
    (31, "sailboat", "boat"),
    (33, "dinghy", "boat"),
    (40, "kayak", "small_craft"),
    (41, "canoe", "small_craft"),
    (44, "jet_ski", "small_craft"),
)
NAMES = tuple(name for _, name, _ in CATEGORIES)
#: Share of objects per class (same order as CATEGORIES), measured on 800 images of seed 0 (45,070
#: objects); the commonest class is about 20 times the rarest. Wrong classes are drawn in proportion to these.
CLASS_FREQUENCY = np.array([0.187, 0.130, 0.084, 0.023, 0.018, 0.015, 0.015,
                            0.020, 0.018, 0.228, 0.156, 0.064, 0.020, 0.011, 0.012])
#: Classes that look alike from above; a planted wrong class stays inside the object's group.
LOOK_ALIKE_GROUPS: tuple[tuple[str, ...], ...] = (
    ("sedan", "hatchback", "estate"), ("van", "box_truck", "bus"), ("shipping_container", "trailer"),
    ("motorboat", "sailboat", "dinghy"), ("kayak", "canoe", "jet_ski"))
#: Loose boxes: IoU 0.55-0.80 with the clean box (subtler than the warehouse's 0.5-0.7), from smaller
#: growth and shifts so that the range is filled (median IoU about 0.68).
LOOSE_BOXES = LooseBoxes(iou=(0.55, 0.80), grow=(0.04, 0.35), shift=(0.01, 0.1))

#: Image sizes (width, height) and how often each is drawn.
IMAGE_SIZES: tuple[tuple[int, int], ...] = ((1024, 768), (1280, 720), (1600, 900), (960, 1280))
IMAGE_SIZE_WEIGHTS = np.array([0.3, 0.3, 0.2, 0.2])
PX_PER_METRE: tuple[float, float] = (3.0, 10.5)      # ground resolution, drawn log-uniform per image
#: Share of images with each condition (drawn independently per image).
IMAGE_CONDITION_RATES: dict[str, float] = {"blur": 0.1, "dim": 0.12, "clutter": 0.35, "crowded": 0.3}
MIN_VISIBLE = 0.5           # every object keeps at least this share of its in-image pixels visible
MIN_IN_IMAGE = 0.3          # an object with less of itself inside the image is not drawn at all
TINY_SIDE = 16              # an object whose box's longer side is under this many px is recorded tiny
JPEG_QUALITY = 90

#: Where objects stand and which classes stand there (relative weights).
ZONE_WEIGHTS: dict[str, dict[str, float]] = {
    "bay": {"sedan": 20, "hatchback": 14, "estate": 9, "van": 2, "motorcycle": 1.6},
    "road": {"sedan": 20, "hatchback": 14, "estate": 9, "van": 7, "box_truck": 7, "bus": 5, "motorcycle": 4},
    "coach": {"bus": 5, "box_truck": 4, "trailer": 2, "van": 1},
    "quay": {"shipping_container": 50, "trailer": 33, "box_truck": 12, "van": 5},
    "berth": {"motorboat": 15, "sailboat": 10, "dinghy": 4, "jet_ski": 0.6},
    "mooring": {"motorboat": 10, "sailboat": 12},
    "water": {"motorboat": 3, "dinghy": 6, "kayak": 4, "canoe": 2.5, "jet_ski": 3},
    "rack": {"kayak": 6, "canoe": 4},
}

BGR = tuple[float, float, float]
GLASS: BGR = (52, 46, 40)
SHADOW: BGR = (255, 255, 255)    # colour of ops drawn only into the shadow mask
CAR_PAINT: tuple[tuple[BGR, float], ...] = (
    ((232, 232, 230), 0.25), ((34, 34, 36), 0.2), ((118, 118, 120), 0.18), ((184, 186, 190), 0.12),
    ((130, 66, 28), 0.09), ((38, 40, 168), 0.08), ((96, 138, 170), 0.04), ((52, 110, 58), 0.04))
CONTAINER_PAINT: tuple[tuple[BGR, float], ...] = (
    ((150, 100, 40), 0.25), ((40, 50, 160), 0.2), ((50, 110, 50), 0.12), ((30, 120, 210), 0.12),
    ((130, 130, 128), 0.16), ((215, 215, 212), 0.15))
BRIGHT: tuple[tuple[BGR, float], ...] = (
    ((30, 40, 210), 0.25), ((20, 200, 240), 0.2), ((20, 130, 245), 0.2), ((40, 200, 120), 0.15),
    ((200, 120, 30), 0.2))


def _paint(rng: np.random.Generator, palette: tuple[tuple[BGR, float], ...], spread: float = 6.0) -> np.ndarray:
    """A colour drawn from a weighted palette, jittered within its class."""
    weights = np.array([w for _, w in palette])
    colour = palette[int(rng.choice(len(palette), p=weights / weights.sum()))][0]
    return jitter_colour(rng, colour, spread, (0.9, 1.1))


def _taper(x0: float, x1: float, w0: float, w1: float) -> np.ndarray:
    """Quadrilateral from x0 (width w0) to x1 (width w1), centred on the long axis."""
    return np.array([[x0, -w0 / 2], [x1, -w1 / 2], [x1, w1 / 2], [x0, w0 / 2]])


def _hull(L: float, W: float, bow: float, stern: float, n: int = 6) -> np.ndarray:
    """Boat outline seen from above: square-ish stern at -L/2, parallel sides, a rounded point at +L/2."""
    xb = L / 2 - bow * L
    t = np.linspace(0.0, 1.0, n + 1)[1:]
    bow_x = xb + t * (L / 2 - xb)
    bow_y = W / 2 * np.sqrt(np.clip(1 - t ** 2, 0, 1))
    side = np.vstack([[[-L / 2, stern * W / 2], [-L / 2 + 0.1 * L, W / 2], [xb, W / 2]],
                      np.stack([bow_x, bow_y], 1)])
    return np.vstack([side, side[::-1][1:] * [1, -1]])


def _lens(L: float, W: float, power: float, n: int = 8) -> np.ndarray:
    """Pointed at both ends (kayak, canoe): half-width ``W/2 * (1 - (2x/L)^2) ** power``."""
    x = np.linspace(-L / 2, L / 2, 2 * n + 1)
    y = W / 2 * (1 - (2 * x / L) ** 2) ** power
    return np.vstack([np.stack([x, y], 1), np.stack([x[::-1], -y[::-1]], 1)[1:-1]])


# --------------------------------------------------------------------------------------------------
# Objects, long axis along +x, front at +x, sizes in px.


def _car(rng: np.random.Generator, L: float, W: float, rear: tuple[float, float], screen: tuple[float, float],
         rails: bool) -> list[Op]:
    """A car from above: painted body, rear window and windscreen (fractions of L), roof, wing mirrors."""
    body = _paint(rng, CAR_PAINT)
    ops = [Op("poly", rounded_rect(L, W, 0.22 * W), shade(body, 1.0)),
           Op("poly", rect(0.08 * L, 1.12 * W, screen[0] * L), shade(body, 0.9)),
           Op("poly", _taper(rear[0] * L, rear[1] * L, 0.74 * W, 0.84 * W), GLASS, inner=True),
           Op("poly", _taper(screen[0] * L, screen[1] * L, 0.84 * W, 0.72 * W), GLASS, inner=True),
           Op("poly", rect((screen[0] - rear[1]) * L, 0.8 * W, (screen[0] + rear[1]) * L / 2),
              shade(body, 1.08, 4), inner=True)]
    if rails:
        for y in (-0.33 * W, 0.33 * W):
            ops.append(Op("line", np.array([[rear[1] * L, y], [screen[0] * L, y]]), shade(body, 0.55), 1, inner=True))
    return ops


def _sedan(rng: np.random.Generator, L: float, W: float) -> list[Op]:
    return _car(rng, L, W, (-0.31, -0.18), (0.1, 0.25), False)


def _hatchback(rng: np.random.Generator, L: float, W: float) -> list[Op]:
    return _car(rng, L, W, (-0.45, -0.34), (0.12, 0.28), False)


def _estate(rng: np.random.Generator, L: float, W: float) -> list[Op]:
    return _car(rng, L, W, (-0.48, -0.41), (0.1, 0.25), bool(rng.random() < 0.6))


def _van(rng: np.random.Generator, L: float, W: float) -> list[Op]:
    """Panel van: one long flat roof (often white, a few ribs), short bonnet, windscreen."""
    body = jitter_colour(rng, (228, 228, 226), 5) if rng.random() < 0.55 else _paint(rng, CAR_PAINT)
    ops = [Op("poly", rounded_rect(L, W, 0.15 * W), shade(body, 1.0)),
           Op("poly", _taper(0.3 * L, 0.4 * L, 0.9 * W, 0.8 * W), GLASS, inner=True),
           Op("poly", rect(0.78 * L, 0.86 * W, -0.1 * L), shade(body, 1.05, 3), inner=True)]
    ops += [Op("line", np.array([[x, -0.4 * W], [x, 0.4 * W]]), shade(body, 0.8), 1, inner=True)
            for x in np.linspace(-0.4 * L, 0.2 * L, 4) if L > 40]
    return ops


def _box_truck(rng: np.random.Generator, L: float, W: float) -> list[Op]:
    """Box truck: a cab at the front, a gap, a taller box behind with roof ribs."""
    cab = _paint(rng, CAR_PAINT)
    box = jitter_colour(rng, (220, 220, 218), 8) if rng.random() < 0.6 else _paint(rng, CONTAINER_PAINT)
    ops = [Op("poly", rounded_rect(0.26 * L, 0.94 * W, 0.12 * W, 0.37 * L), shade(cab, 1.0)),
           Op("poly", _taper(0.4 * L, 0.48 * L, 0.84 * W, 0.76 * W), GLASS, inner=True),
           Op("poly", rect(0.72 * L, W, -0.14 * L), shade(box, 1.0))]
    ops += [Op("line", np.array([[x, -0.46 * W], [x, 0.46 * W]]), shade(box, 0.85), 1, inner=True)
            for x in np.linspace(-0.45 * L, 0.17 * L, 6) if L > 36]
    return ops


def _bus(rng: np.random.Generator, L: float, W: float) -> list[Op]:
    """Bus roof: long box, dark windscreen strip at the front, two air-conditioning units, hatches."""
    roof = _paint(rng, (((225, 225, 225), 0.5), ((30, 200, 235), 0.2), ((40, 40, 180), 0.15), ((150, 90, 30), 0.15)))
    unit = (185, 188, 190)
    return [Op("poly", rounded_rect(L, W, 0.1 * W), shade(roof, 1.0)),
            Op("poly", rect(0.04 * L, 0.9 * W, 0.475 * L), GLASS, inner=True),
            Op("poly", rect(0.14 * L, 0.6 * W, 0.2 * L), unit, inner=True),
            Op("poly", rect(0.1 * L, 0.6 * W, -0.25 * L), unit, inner=True),
            Op("poly", rect(0.05 * L, 0.35 * W, -0.05 * L), shade(roof, 0.8), inner=True)]


def _motorcycle(rng: np.random.Generator, L: float, W: float) -> list[Op]:
    """Motorcycle from above: narrow body, handlebar across the front, sometimes a rider."""
    tank = _paint(rng, BRIGHT + ((((30, 30, 30), 0.4),)))
    ops = [Op("poly", rounded_rect(L, 0.42 * W, 0.2 * W), (35, 35, 38)),
           Op("poly", rounded_rect(0.3 * L, 0.4 * W, 0.15 * W, 0.1 * L), shade(tank, 1.0), inner=True),
           Op("poly", rect(0.06 * L, W, 0.3 * L), (60, 60, 62))]
    if rng.random() < 0.6:
        ops += [Op("poly", rounded_rect(0.22 * L, 0.9 * W, 0.3 * W, -0.05 * L), _paint(rng, BRIGHT), inner=True),
                Op("circle", np.array([[0.07 * L, 0.0]]), (30, 30, 30), radius=0.12 * L, inner=True)]
    return ops


def _ribs(L: float, W: float, colour: BGR, spacing_px: float) -> list[Op]:
    """Lines across a box roof every ``spacing_px`` (corrugation, tarp straps), none if too dense to draw."""
    n = int(L / spacing_px)
    if n < 2:
        return []
    return [Op("line", np.array([[x, -0.46 * W], [x, 0.46 * W]]), colour, 1, inner=True)
            for x in np.linspace(-0.45 * L, 0.45 * L, min(n, 24))]


def _shipping_container(rng: np.random.Generator, L: float, W: float) -> list[Op]:
    """ISO container roof: sharp rectangle, corrugation across, dark corner castings."""
    paint = _paint(rng, CONTAINER_PAINT)
    c = max(1.0, 0.08 * W)
    corners = [Op("poly", rect(c, c, sx * (L / 2 - c / 2), sy * (W / 2 - c / 2)), shade(paint, 0.5), inner=True)
               for sx in (-1, 1) for sy in (-1, 1)]
    return [Op("poly", rect(L, W), shade(paint, 1.0))] + _ribs(L, W, shade(paint, 0.8), 3.0) + corners


def _trailer(rng: np.random.Generator, L: float, W: float) -> list[Op]:
    """Semi-trailer without its tractor: rounded front corners, smooth or tarp roof with straps, dark rear bar."""
    tarp = rng.random() < 0.45
    roof = (_paint(rng, (((150, 100, 40), 0.4), ((60, 120, 60), 0.3), ((90, 90, 90), 0.3))) if tarp
            else jitter_colour(rng, (212, 214, 214), 8))
    return ([Op("poly", rounded_rect(L, W, 0.25 * W), shade(roof, 1.0)),
             Op("poly", rect(0.02 * L + 1, W, -0.49 * L), (40, 40, 40), inner=True)]
            + _ribs(L, W, shade(roof, 0.7 if tarp else 0.9), 5.0 if tarp else 9.0))


def _motorboat(rng: np.random.Generator, L: float, W: float) -> list[Op]:
    """Motorboat: white pointed hull, teak or white deck, cabin or console with windscreen, outboards."""
    hull = jitter_colour(rng, (236, 236, 234), 5) if rng.random() < 0.8 else _paint(rng, CONTAINER_PAINT)
    deck = jitter_colour(rng, (90, 130, 170), 8) if rng.random() < 0.4 else shade(hull, 0.93)
    shape = _hull(L, W, rng.uniform(0.28, 0.38), 0.9)
    ops = [Op("poly", shape, shade(hull, 1.0)),
           Op("poly", shape * 0.86, deck, inner=True),
           Op("poly", rounded_rect(0.3 * L, 0.62 * W, 0.15 * W, 0.05 * L), shade(hull, 1.04, 4), inner=True),
           Op("poly", _taper(0.17 * L, 0.22 * L, 0.6 * W, 0.5 * W), GLASS, inner=True)]
    if rng.random() < 0.3:      # canopy over the cockpit
        ops.append(Op("poly", rounded_rect(0.22 * L, 0.7 * W, 0.1 * W, -0.2 * L),
                      _paint(rng, (((100, 50, 20), 0.6), ((90, 90, 90), 0.4))), inner=True))
    if rng.random() < 0.5:      # outboard engines behind the transom
        ops.append(Op("poly", rect(0.06 * L, 0.3 * W, -0.53 * L), (30, 30, 32)))
    return ops


def _sailboat(rng: np.random.Generator, L: float, W: float) -> list[Op]:
    """Sailing yacht: slim hull, cabin trunk, teak cockpit, mast, boom with a coloured sail cover, forestay."""
    hull = jitter_colour(rng, (238, 238, 236), 4)
    cover = _paint(rng, (((130, 60, 20), 0.5), ((60, 100, 40), 0.2), ((40, 30, 120), 0.15), ((160, 160, 160), 0.15)))
    shape = _hull(L, W, rng.uniform(0.4, 0.5), 0.8)
    mast = np.array([[0.12 * L, 0.0]])
    return [Op("poly", shape, shade(hull, 1.0)),
            Op("poly", rounded_rect(0.36 * L, 0.56 * W, 0.2 * W, 0.0), shade(hull, 0.9), inner=True),
            Op("poly", rect(0.2 * L, 0.6 * W, -0.3 * L), (95, 135, 175), inner=True),
            Op("line", np.array([[0.12 * L, 0.0], [-0.32 * L, 0.0]]), shade(cover, 1.0), max(1, round(0.1 * W)),
               inner=True),
            Op("line", np.array([[0.12 * L, 0.0], [0.48 * L, 0.0]]), (150, 150, 150), 1, inner=True),
            Op("circle", mast, (40, 40, 40), radius=max(0.7, 0.04 * W), inner=True)]


def _dinghy(rng: np.random.Generator, L: float, W: float) -> list[Op]:
    """Inflatable tender (grey, orange or black tubes round a floor) or a small white rowing dinghy."""
    if rng.random() < 0.7:
        tube = _paint(rng, (((150, 150, 150), 0.5), ((30, 110, 230), 0.25), ((40, 40, 40), 0.25)))
        ops = [Op("poly", rounded_rect(L, W, 0.48 * W), shade(tube, 1.0)),
               Op("poly", rounded_rect(0.72 * L, 0.56 * W, 0.25 * W, -0.05 * L), shade(tube, 0.65, 10), inner=True)]
    else:
        hull = jitter_colour(rng, (230, 230, 228), 6)
        ops = [Op("poly", _hull(L, W, 0.35, 0.85), shade(hull, 1.0)),
               Op("poly", _hull(0.84 * L, 0.78 * W, 0.35, 0.85), shade(hull, 0.85), inner=True),
               Op("line", np.array([[0.0, -0.38 * W], [0.0, 0.38 * W]]), (90, 130, 170), 1, inner=True)]
    if rng.random() < 0.6:      # outboard motor
        ops.append(Op("poly", rect(0.12 * L, 0.22 * W, -0.54 * L), (25, 25, 28)))
    return ops


def _kayak(rng: np.random.Generator, L: float, W: float) -> list[Op]:
    """Kayak: bright, pointed at both ends, dark cockpit, sometimes a paddler's head."""
    colour = _paint(rng, BRIGHT)
    ops = [Op("poly", _lens(L, W, 0.8), shade(colour, 1.0)),
           Op("poly", rounded_rect(0.2 * L, 0.6 * W, 0.3 * W), (30, 30, 32), inner=True)]
    if rng.random() < 0.4:
        ops.append(Op("circle", np.zeros((1, 2)), _paint(rng, BRIGHT), radius=0.32 * W, inner=True))
    return ops


def _canoe(rng: np.random.Generator, L: float, W: float) -> list[Op]:
    """Open canoe: fuller ends, darker open hull inside, thwarts across."""
    colour = _paint(rng, (((50, 110, 40), 0.35), ((40, 40, 170), 0.25), ((70, 120, 170), 0.25),
                          ((170, 170, 170), 0.15)))
    ops = [Op("poly", _lens(L, W, 0.5), shade(colour, 1.0)),
           Op("poly", _lens(0.9 * L, 0.78 * W, 0.5), shade(colour, 0.7), inner=True)]
    ops += [Op("line", np.array([[x, -0.36 * W], [x, 0.36 * W]]), shade(colour, 1.2, 20), 1, inner=True)
            for x in (-0.22 * L, 0.0, 0.22 * L)]
    return ops


def _jet_ski(rng: np.random.Generator, L: float, W: float) -> list[Op]:
    """Personal watercraft: short pointed hull, dark saddle along the middle, handlebar, sometimes a rider."""
    colour = _paint(rng, BRIGHT + (((236, 236, 236), 0.5),))
    ops = [Op("poly", _hull(L, W, 0.4, 0.85), shade(colour, 1.0)),
           Op("poly", rounded_rect(0.42 * L, 0.36 * W, 0.15 * W, -0.12 * L), (35, 35, 38), inner=True),
           Op("line", np.array([[0.15 * L, -0.36 * W], [0.15 * L, 0.36 * W]]), (50, 50, 50), 1, inner=True)]
    if rng.random() < 0.4:
        ops.append(Op("circle", np.array([[0.0, 0.0]]), _paint(rng, BRIGHT), radius=0.18 * W, inner=True))
    return ops


@dataclass(frozen=True)
class Kind:
    """How one class is built: drawing function, length range (m), width as a share of length, height (m)."""

    build: Callable[[np.random.Generator, float, float], list[Op]]
    length: tuple[float, float]
    width: tuple[float, float]
    height: float


KINDS: dict[str, Kind] = {
    "sedan": Kind(_sedan, (4.4, 4.95), (0.37, 0.41), 1.45),
    "hatchback": Kind(_hatchback, (3.7, 4.2), (0.41, 0.46), 1.5),
    "estate": Kind(_estate, (4.6, 5.0), (0.36, 0.39), 1.5),
    "van": Kind(_van, (4.9, 5.9), (0.34, 0.4), 2.3),
    "box_truck": Kind(_box_truck, (6.5, 8.5), (0.28, 0.36), 3.3),
    "bus": Kind(_bus, (10.5, 12.5), (0.2, 0.24), 3.1),
    "motorcycle": Kind(_motorcycle, (2.0, 2.3), (0.34, 0.4), 1.2),
    "shipping_container": Kind(_shipping_container, (6.06, 12.19), (0.2, 0.4), 2.6),
    "trailer": Kind(_trailer, (7.0, 13.6), (0.18, 0.35), 3.8),
    "motorboat": Kind(_motorboat, (5.5, 16.0), (0.33, 0.38), 1.8),
    "sailboat": Kind(_sailboat, (7.5, 14.0), (0.3, 0.34), 2.0),
    "dinghy": Kind(_dinghy, (2.4, 3.6), (0.44, 0.5), 0.6),
    "kayak": Kind(_kayak, (3.2, 5.0), (0.13, 0.18), 0.4),
    "canoe": Kind(_canoe, (4.3, 5.3), (0.17, 0.2), 0.5),
    "jet_ski": Kind(_jet_ski, (2.8, 3.4), (0.36, 0.4), 0.9),
}


def _dimensions(rng: np.random.Generator, name: str, max_length: float = math.inf) -> tuple[float, float]:
    """Length and width in metres; containers come in 20 ft or 40 ft, trailers as city or semi-trailers."""
    kind = KINDS[name]
    lo, hi = kind.length
    if name == "shipping_container":
        length = (6.06, 12.19)[int(rng.random() < 0.6)]
        return length, 2.44
    if name == "trailer":
        length = rng.uniform(12.5, hi) if rng.random() < 0.6 else rng.uniform(lo, 8.0)
        return length, 2.5
    length = min(rng.uniform(lo, hi), max_length)
    return length, length * rng.uniform(*kind.width)


# --------------------------------------------------------------------------------------------------
# Layout in metres (x along the shore, water at y > shore), turned into the image by one similarity.


@dataclass
class Slot:
    """A place an object may stand: zone, centre (m), heading (rad), longest length that fits (m)."""

    zone: str
    x: float
    y: float
    heading: float
    max_length: float = math.inf
    exclusive: bool = False     # refuse if it would cover another object (free-roaming things)


@dataclass
class Plan:
    """One image's layout in world metres: ground regions, markings, object slots and clutter."""

    regions: list[tuple[np.ndarray, BGR]] = field(default_factory=list)
    lines: list[tuple[np.ndarray, BGR, float]] = field(default_factory=list)       # polyline, colour, width m
    slots: list[Slot] = field(default_factory=list)
    trees: list[tuple[float, float, float]] = field(default_factory=list)          # x, y, radius (m)
    marks: list[tuple[str, float, float, float]] = field(default_factory=list)     # kind, x, y, size (m)


def _band(x0: float, x1: float, y0: float, y1: float) -> np.ndarray:
    return np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]], dtype=np.float64)


def _bay_row(rng: np.random.Generator, plan: Plan, zone: str, x0: float, top: float, bays: int, pitch: float,
             depth: float, facing: float, occupancy: float, paint: BGR) -> None:
    """One row of ``bays`` marked bays hanging below ``top``; vehicles nose in (mostly) with a little slack."""
    xs = x0 + pitch * np.arange(bays + 1)
    for x in xs:
        plan.lines.append((np.array([[x, top], [x, top - depth]]), paint, 0.12))
    plan.lines.append((np.array([[x0, top - depth], [xs[-1], top - depth]]), paint, 0.12))
    for x in xs[:-1] + pitch / 2:
        if rng.random() < occupancy:
            jitter = rng.normal(0, [0.12, 0.2])
            heading = facing * math.pi / 2 + (math.pi if rng.random() < 0.3 else 0.0) + rng.normal(0, 0.04)
            plan.slots.append(Slot(zone, x + jitter[0], top - depth / 2 + jitter[1], heading, depth + 0.9))
        elif rng.random() < 0.15:              # an oil stain in an empty bay
            spot = (x + rng.normal(0, 0.2), top - depth / 2 + rng.normal(0, 0.6))
            plan.marks.append(("oil", *spot, rng.uniform(0.4, 0.9)))


def _car_park(rng: np.random.Generator, plan: Plan, top: float, reach: float, crowded: bool) -> None:
    """Double rows of car bays below ``top`` (aisle, bays, planter with trees or not, bays), maybe a coach row."""
    length = rng.uniform(20, 55)
    x0 = rng.uniform(-0.5, 0.5) * reach - length / 2
    pitch, depth = rng.uniform(2.4, 2.65), 5.0
    occupancy = rng.uniform(0.85, 0.98) if crowded else rng.uniform(0.35, 0.75)
    paint: BGR = (235, 235, 235) if rng.random() < 0.75 else (40, 200, 230)
    rows = int(rng.integers(1, 3))
    coach = rng.random() < 0.4
    bottom = top - rows * (2 * depth + 8.5) - (20.5 if coach else 0.0)
    plan.regions.append((_band(x0 - 4, x0 + length + 4, bottom, top), tuple(jitter_colour(rng, (104, 106, 108), 2))))
    bays = int(length / pitch)
    y = top
    for _ in range(rows):
        y -= 6.5                                   # aisle
        _bay_row(rng, plan, "bay", x0, y, bays, pitch, depth, 1.0, occupancy, paint)
        y -= depth
        if rng.random() < 0.4:                     # planter strip with trees over the bays
            plan.regions.append((_band(x0, x0 + bays * pitch, y - 2.0, y), tuple(jitter_colour(rng, (60, 120, 80), 6))))
            for x in np.arange(x0 + rng.uniform(2, 5), x0 + bays * pitch, rng.uniform(6, 10)):
                plan.trees.append((x, y - 1.0, rng.uniform(2.2, 4.0)))
        y -= 2.0
        _bay_row(rng, plan, "bay", x0, y, bays, pitch, depth, -1.0, occupancy, paint)
        y -= depth
    if coach:                                      # long bays for coaches, trucks and trailers
        pitch = rng.uniform(3.6, 4.2)
        _bay_row(rng, plan, "coach", x0, y - 7.5, int(length / pitch), pitch, 13.0, 1.0, max(occupancy, 0.6), paint)


def _road(rng: np.random.Generator, plan: Plan, top: float, reach: float) -> float:
    """Two-lane road below ``top`` with edge lines, a dashed centre line and traffic; returns its lower edge."""
    y0, y1 = top - 7.0, top
    plan.regions.append((_band(-reach, reach, y0, y1), tuple(jitter_colour(rng, (88, 90, 92), 2))))
    for y in (y0 + 0.3, y1 - 0.3):
        plan.lines.append((np.array([[-reach, y], [reach, y]]), (225, 225, 225), 0.15))
    for x in np.arange(-reach, reach, 9.0):
        plan.lines.append((np.array([[x, y0 + 3.5], [x + 3.0, y0 + 3.5]]), (225, 225, 225), 0.15))
    for _ in range(int(rng.integers(0, 3))):
        plan.marks.append(("arrow", rng.uniform(-0.8, 0.8) * reach, y0 + (1.75 if rng.random() < 0.5 else 5.25), 4.0))
    if rng.random() < 0.35:
        plan.marks.append(("zebra", rng.uniform(-0.6, 0.6) * reach, y0 + 3.5, 7.0))
    for _ in range(int(rng.integers(0, 7))):
        lane = int(rng.integers(2))
        plan.slots.append(Slot("road", rng.uniform(-1, 1) * reach, y0 + (1.75, 5.25)[lane] + rng.normal(0, 0.2),
                               (0.0, math.pi)[lane] + rng.normal(0, 0.02), exclusive=True))
    return y0


def _quay(rng: np.random.Generator, plan: Plan, shore: float, reach: float, crowded: bool) -> float:
    """Concrete quay along the water: bollards, pallets, a cargo row and a kayak rack; returns its lower edge."""
    cargo = rng.random() < 0.5
    depth = rng.uniform(14, 18) if cargo else rng.uniform(7, 12)
    bottom = shore - depth
    plan.regions.append((_band(-reach, reach, bottom, shore), tuple(jitter_colour(rng, (165, 168, 170), 6))))
    for x in np.arange(-reach, reach, rng.uniform(6, 10)):
        plan.marks.append(("bollard", x, shore - 0.5, 0.35))
    for _ in range(int(rng.integers(0, 5))):
        plan.marks.append(("pallet", rng.uniform(-1, 1) * reach, rng.uniform(bottom + 1, shore - 1.5), 1.2))
    if cargo:                                     # containers and trailers side by side, across the quay
        x = rng.uniform(-0.6, 0.3) * reach
        for _ in range(int(rng.integers(2, 8))):
            gap = rng.uniform(0.2, 0.8) if crowded else rng.uniform(0.8, 3.0)
            plan.slots.append(Slot("quay", x, bottom + depth / 2 + rng.normal(0, 0.3),
                                   (1 if rng.random() < 0.5 else -1) * math.pi / 2 + rng.normal(0, 0.015),
                                   depth - 1.0))
            x += 2.5 + gap
    if rng.random() < 0.3:                        # kayak rack: small craft side by side along the quay
        x = rng.uniform(-0.6, 0.5) * reach
        for _ in range(int(rng.integers(3, 9))):
            plan.slots.append(Slot("rack", x, shore - 3.5 + rng.normal(0, 0.15), math.pi / 2 + rng.normal(0, 0.03),
                                   exclusive=True))             # not on top of a container row
            x += rng.uniform(0.85, 1.2)
    return bottom


def _marina(rng: np.random.Generator, plan: Plan, shore: float, reach: float, crowded: bool) -> float:
    """Pontoons out from the quay with boats moored side by side on both sides; returns the far end (m)."""
    boat_max = rng.uniform(8.0, 14.0)
    spacing = 2 * boat_max + 4.0
    count = int(rng.integers(1, 5))
    x_first = rng.uniform(-0.5, 0.5) * reach - (count - 1) * spacing / 2
    length = rng.uniform(20, 50)
    wood = tuple(jitter_colour(rng, (120, 140, 150), 6))
    occupancy = rng.uniform(0.85, 1.0) if crowded else rng.uniform(0.4, 0.8)
    for k in range(count):
        xp = x_first + k * spacing
        plan.regions.append((_band(xp - 1.25, xp + 1.25, shore - 0.5, shore + length), wood))
        plan.marks.append(("ring", xp + 1.0, shore + length * rng.uniform(0.2, 0.9), 0.35))
        for side in (-1.0, 1.0):
            y = shore + 2.0
            while y < shore + length - 1.0:
                if rng.random() >= occupancy:
                    y += rng.uniform(2.5, 4.0)
                    continue
                beam = rng.uniform(2.6, 4.2)
                gap = rng.uniform(0.88, 1.05) if crowded else rng.uniform(1.15, 1.6)
                bow_in = rng.random() < 0.5
                heading = (math.pi if side > 0 else 0.0) if bow_in else (0.0 if side > 0 else math.pi)
                plan.slots.append(Slot("berth", xp + side * (1.25 + 0.4 + boat_max / 2), y + beam / 2,
                                       heading + rng.normal(0, 0.03), boat_max))
                if not crowded and rng.random() < 0.5:
                    finger = xp + side * (1.25 + boat_max * 0.3)
                    plan.lines.append((np.array([[xp + side * 1.25, y + beam * gap],
                                                 [finger, y + beam * gap]]), wood, 0.6))
                y += beam * gap
    return shore + length


def _open_water(rng: np.random.Generator, plan: Plan, start: float, shore: float, reach: float,
                crowded: bool) -> None:
    """Boats on swinging moorings beyond the pontoons, buoys, and small craft out on the water."""
    wind = rng.uniform(0, 2 * math.pi)
    for _ in range(int(rng.integers(0, 9))):
        x, y = rng.uniform(-1, 1) * reach, rng.uniform(start + 6, start + 6 + reach)
        plan.slots.append(Slot("mooring", x, y, wind + rng.normal(0, 0.3), exclusive=True))
        plan.marks.append(("buoy", x + 7 * math.cos(wind), y + 7 * math.sin(wind), 0.4))
    for _ in range(int(rng.integers(0, 6))):
        plan.marks.append(("buoy", rng.uniform(-1, 1) * reach, rng.uniform(shore + 4, shore + reach), 0.35))
    groups = int(rng.integers(0, 3)) + (2 if crowded else 0)
    for _ in range(groups):                        # paddlers together, or a single craft
        x, y, heading = rng.uniform(-1, 1) * reach, rng.uniform(shore + 5, shore + reach), rng.uniform(0, 2 * math.pi)
        for _ in range(int(rng.integers(1, 5))):
            plan.slots.append(Slot("water", x + rng.normal(0, 2.5), y + rng.normal(0, 2.5),
                                   heading + rng.normal(0, 0.25), exclusive=True))


def _plan(rng: np.random.Generator, half_min: float, reach: float, conditions: dict[str, bool]) -> Plan:
    """Layout of one image; ``half_min`` is half the shorter image side and ``reach`` half its diagonal (m)."""
    plan = Plan()
    crowded = conditions["crowded"]
    shore = rng.uniform(-0.9, 0.9) * half_min
    plan.regions.append((_band(-reach, reach, -reach, shore), tuple(jitter_colour(rng, (70, 128, 92), 8))))
    land_edge = _quay(rng, plan, shore, reach, crowded)
    if rng.random() < 0.75:
        land_edge = _road(rng, plan, land_edge, reach) - 1.5
    _car_park(rng, plan, land_edge, reach, crowded)
    trees = int(rng.integers(2, 7)) * (3 if conditions["clutter"] else 1)
    for _ in range(trees):
        x, y = rng.uniform(-1, 1) * reach, rng.uniform(-reach, shore - 2)
        plan.trees.append((x, y, rng.uniform(2.0, 5.0)))
    if conditions["clutter"]:
        inland = max(-reach, land_edge - 20)      # buildings stand back from the car park
        for _ in range(int(rng.integers(1, 4))):
            plan.marks.append(("roof", rng.uniform(-1, 1) * reach, rng.uniform(-reach, inland), 0.0))
        for _ in range(int(rng.integers(2, 8))):
            plan.marks.append(("lamp", rng.uniform(-1, 1) * reach, rng.uniform(-reach, shore - 1), 0.15))
    far = _marina(rng, plan, shore, reach, crowded) if rng.random() < 0.85 else shore
    _open_water(rng, plan, far, shore, reach, crowded)
    return plan


# --------------------------------------------------------------------------------------------------
# Rendering: world -> image, ground, clutter, shadows, objects, trees, light and lens.


@dataclass
class View:
    """The similarity from world metres to image pixels: ``px = u * R(angle) @ F @ world + centre``."""

    u: float
    matrix: np.ndarray          # 2 x 2, rotation and mirror times u
    centre: np.ndarray          # image centre (px)

    def points(self, world: np.ndarray) -> np.ndarray:
        return world @ self.matrix.T + self.centre

    def orient(self, ops: list[Op], heading: float) -> list[Op]:
        """Object ops (px, long axis along x) turned to ``heading`` in the world, then into the image."""
        c, s = math.cos(heading), math.sin(heading)
        m = self.matrix / self.u @ np.array([[c, -s], [s, c]])
        return [Op(op.kind, op.points @ m.T, op.colour, op.thickness, op.radius, op.inner) for op in ops]


def _mark_ops(rng: np.random.Generator, kind: str, size: float, u: float) -> list[Op]:
    """Ground clutter in px, origin at its centre."""
    s = size * u
    if kind == "oil":
        return [Op("circle", np.zeros((1, 2)), (62, 64, 66), radius=s)]
    if kind == "arrow":
        shaft = rect(0.6 * s, 0.15 * s, -0.2 * s)
        head = np.array([[0.1 * s, -0.25 * s], [0.5 * s, 0.0], [0.1 * s, 0.25 * s]])
        return [Op("poly", shaft, (225, 225, 225)), Op("poly", head, (225, 225, 225))]
    if kind == "zebra":
        return [Op("poly", rect(0.5 * u, s, x * u), (230, 230, 230)) for x in np.arange(-3.0, 3.5, 1.0)]
    if kind == "bollard":
        return [Op("circle", np.zeros((1, 2)), (40, 40, 45), radius=max(0.6, s))]
    if kind == "pallet":
        wood = jitter_colour(rng, (80, 140, 175), 10)
        return [Op("poly", rect(s, 0.83 * s), shade(wood, 1.0))] + [
            Op("line", np.array([[-s / 2, y], [s / 2, y]]), shade(wood, 0.6), 1) for y in (-0.2 * s, 0.2 * s)]
    if kind == "ring":
        return [Op("circle", np.zeros((1, 2)), (30, 90, 235), max(1, round(0.3 * s)), radius=s)]
    if kind == "buoy":
        colour = ((30, 110, 240), (235, 235, 235), (30, 200, 240))[int(rng.integers(3))]
        return [Op("circle", np.zeros((1, 2)), colour, radius=max(0.7, s))]
    if kind == "lamp":
        return [Op("circle", np.zeros((1, 2)), (150, 150, 150), radius=max(0.7, s))]
    w, h = rng.uniform(12, 30) * u, rng.uniform(10, 20) * u          # roof
    tone = jitter_colour(rng, ((120, 120, 124), (70, 90, 160))[int(rng.integers(2))], 8)
    return [Op("poly", rect(w, h), shade(tone, 1.0)), Op("poly", rect(w, h / 2, 0, h / 4), shade(tone, 0.8)),
            Op("line", np.array([[-w / 2, 0.0], [w / 2, 0.0]]), shade(tone, 1.2), 1)]


def _tree_ops(rng: np.random.Generator, radius: float, sun: np.ndarray) -> list[Op]:
    """Tree canopy in px: overlapping discs of leaf greens, lit on the sun side."""
    green = jitter_colour(rng, (50, 105, 60), 8)
    blobs = rng.normal(0, 0.35 * radius, (int(rng.integers(4, 8)), 2))
    ops = [Op("circle", b[None], shade(green, rng.uniform(0.85, 1.1)), radius=radius * rng.uniform(0.55, 0.75))
           for b in blobs]
    ops.append(Op("circle", (-0.3 * radius * sun)[None], shade(green, 1.3, 10), radius=0.35 * radius, inner=True))
    return ops


@dataclass
class Drawn:
    """A placed object's drawing extras: zone, height (m) for its shadow, sailboat mast length (m)."""

    zone: str
    height: float
    mast: float


def _layout(rng: np.random.Generator, width: int, height: int, conditions: dict[str, bool], view: View,
            plan: Plan, sun: np.ndarray) -> tuple[Scene, list[Drawn], list[tuple[list[Op], tuple[int, int]]]]:
    """Objects into the scene (class per slot, size, look), then tree canopies over them."""
    scene = Scene(width, height, conditions, owner=np.full((height, width), -1, dtype=np.int16))
    drawn: list[Drawn] = []
    margin = 20 * view.u
    for slot in plan.slots:
        weights = ZONE_WEIGHTS[slot.zone]
        names = list(weights)
        p = np.array([weights[n] for n in names])
        name = names[int(rng.choice(len(names), p=p / p.sum()))]
        length, width_m = _dimensions(rng, name, slot.max_length)
        ops = view.orient(KINDS[name].build(rng, length * view.u, width_m * view.u), slot.heading)
        centre_f = view.points(np.array([[slot.x, slot.y]]))[0]
        if not (-margin < centre_f[0] < width + margin and -margin < centre_f[1] < height + margin):
            continue
        mask, c = local_mask(ops)
        placed = put_object(scene, NAMES.index(name), mask > 0, c, (int(round(centre_f[0])), int(round(centre_f[1]))),
                            ops=ops, min_visible=MIN_VISIBLE, exclusive=slot.exclusive, min_in_image=MIN_IN_IMAGE)
        if placed is not None:
            mast = length * rng.uniform(1.2, 1.45) if name == "sailboat" else 0.0
            drawn.append(Drawn(slot.zone, KINDS[name].height, mast))
    canopies: list[tuple[list[Op], tuple[int, int]]] = []
    for x, y, radius in plan.trees:
        centre_f = view.points(np.array([[x, y]]))[0]
        if not (-margin < centre_f[0] < width + margin and -margin < centre_f[1] < height + margin):
            continue
        ops = _tree_ops(rng, radius * view.u, sun)
        mask, c = local_mask(ops)
        centre = (int(round(centre_f[0])), int(round(centre_f[1])))
        if put_occluder(scene, mask > 0, c, centre):
            canopies.append((ops, centre))
    settle_visibility(scene)
    return scene, drawn, canopies


def _ripples(rng: np.random.Generator, width: int, height: int, u: float, tone: np.ndarray) -> np.ndarray:
    """Wind ripples on the water: waves 2-4 m long across one direction, bent by the slow ``tone`` field."""
    angle = rng.uniform(0, 2 * math.pi)
    k = np.float32(2 * math.pi / (rng.uniform(2.0, 4.0) * u))
    phase = (np.arange(width, dtype=np.float32)[None, :] * np.float32(math.cos(angle) * k)
             + np.arange(height, dtype=np.float32)[:, None] * np.float32(math.sin(angle) * k))
    return np.float32(rng.uniform(2.0, 4.5)) * np.sin(phase + 6.0 * tone)


def _render(rng: np.random.Generator, scene: Scene, drawn: list[Drawn], plan: Plan, view: View,
            canopies: list[tuple[list[Op], tuple[int, int]]], sun: np.ndarray, sun_slope: float
            ) -> tuple[np.ndarray, dict[str, float]]:
    """Pixels ``uint8 [H, W, 3]`` BGR of one image and the strength of each condition."""
    W, H, u = scene.width, scene.height, view.u
    image = np.empty((H, W, 3), dtype=np.uint8)
    image[:] = np.clip(jitter_colour(rng, (92, 84, 46), 6), 0, 255).astype(np.uint8)       # water
    land = np.zeros((H, W), dtype=np.uint8)
    for polygon, colour in plan.regions:
        draw(image, [Op("poly", view.points(polygon), colour)], (0, 0))
        draw(land, [Op("poly", view.points(polygon), SHADOW)], (0, 0), mask=True)
    for line, colour, width_m in plan.lines:
        draw(image, [Op("line", view.points(line), colour, max(1, round(width_m * u)))], (0, 0))
    shadow = np.zeros((H, W), dtype=np.uint8)
    for kind, x, y, size in plan.marks:
        centre = view.points(np.array([[x, y]]))[0]
        if not (-40 * u < centre[0] < W + 40 * u and -40 * u < centre[1] < H + 40 * u):
            continue
        ops = view.orient(_mark_ops(rng, kind, size, u), rng.uniform(0, 2 * math.pi))
        at = (int(centre[0]), int(centre[1]))
        draw(image, ops, at)
        if kind == "lamp":          # a post: a long thin shadow from its foot
            tip = sun * sun_slope * u * 8.0
            draw(shadow, [Op("line", np.array([[0.0, 0.0], tip]), SHADOW, max(1, round(0.25 * u)))], at, mask=True)
        elif kind == "roof":        # a building 6 m high
            offset = sun * sun_slope * u * 6.0
            draw(shadow, ops, (int(at[0] + offset[0]), int(at[1] + offset[1])), mask=True)
    for obj, extra in zip(scene.objects, drawn):
        offset = sun * sun_slope * u * extra.height
        draw(shadow, obj.ops, (int(obj.centre[0] + offset[0]), int(obj.centre[1] + offset[1])), mask=True)
        if extra.mast:
            tip = sun * sun_slope * u * extra.mast
            draw(shadow, [Op("line", np.array([[0.0, 0.0], tip]), SHADOW, 1)], obj.centre, mask=True)
    for ops, centre in canopies:
        offset = sun * sun_slope * u * 7.0
        draw(shadow, ops, (int(centre[0] + offset[0]), int(centre[1] + offset[1])), mask=True)
    shadow = cv2.GaussianBlur(shadow, (0, 0), max(0.8, 0.2 * u))
    tone = cv2.resize(rng.standard_normal((6, 8), dtype=np.float32), (W, H), interpolation=cv2.INTER_CUBIC)
    grain = cv2.resize(rng.standard_normal((H // 2, W // 2), dtype=np.float32), (W, H))
    depth = np.float32(rng.uniform(0.35, 0.55))
    gain = (1.0 + 0.05 * tone) * (1.0 - depth / 255.0 * shadow.astype(np.float32))
    texture = 4.0 * grain + _ripples(rng, W, H, u, tone) * (land == 0)
    image = np.clip(image * gain[:, :, None] + texture[:, :, None], 0, 255).astype(np.uint8)
    for obj in scene.objects:
        draw(image, obj.ops, obj.centre)
    for ops, centre in canopies:
        draw(image, ops, centre)
    scale = min(W, H) / 720.0
    return light_and_lens(rng, image, dim=scene.conditions["dim"], blur=scene.conditions["blur"], u=scale)


def _in_group(scene: Scene, u: float) -> np.ndarray:
    """Whether each object has another object's box within 0.6 m (parked or moored side by side)."""
    boxes = np.array([obj.bbox for obj in scene.objects], dtype=np.float64).reshape(-1, 4)
    x0, y0 = boxes[:, 0], boxes[:, 1]
    x1, y1 = x0 + boxes[:, 2], y0 + boxes[:, 3]
    gap_x = np.maximum(x0[:, None] - x1[None, :], x0[None, :] - x1[:, None])
    gap_y = np.maximum(y0[:, None] - y1[None, :], y0[None, :] - y1[:, None])
    near = np.maximum(gap_x, gap_y) <= 0.6 * u
    np.fill_diagonal(near, False)
    return near.any(axis=1)


def _image(rng: np.random.Generator, image_id: int) -> tuple[np.ndarray, dict[str, Any], list[dict[str, Any]]]:
    """Draw one image: size, conditions, ground resolution, turn, layout, pixels; its record and objects."""
    width, height = IMAGE_SIZES[int(rng.choice(len(IMAGE_SIZES), p=IMAGE_SIZE_WEIGHTS))]
    conditions = {k: bool(rng.random() < p) for k, p in IMAGE_CONDITION_RATES.items()}
    u = float(np.exp(rng.uniform(*np.log(PX_PER_METRE))))
    angle = rng.uniform(0, 2 * math.pi)
    mirror = bool(rng.random() < 0.5)
    c, s = math.cos(angle), math.sin(angle)
    matrix = u * np.array([[c, -s], [s, c]]) @ np.diag([1.0, -1.0 if mirror else 1.0])
    view = View(u, matrix, np.array([width / 2, height / 2]))
    sun_angle = rng.uniform(0, 2 * math.pi)
    sun = np.array([math.cos(sun_angle), math.sin(sun_angle)])
    sun_slope = 1.0 / math.tan(math.radians(rng.uniform(30, 70)))
    plan = _plan(rng, 0.5 * min(width, height) / u, 0.5 * math.hypot(width, height) / u + 3, conditions)
    scene, drawn, canopies = _layout(rng, width, height, conditions, view, plan, sun)
    pixels, strength = _render(rng, scene, drawn, plan, view, canopies, sun, sun_slope)
    for obj, near in zip(scene.objects, _in_group(scene, u)):
        obj.in_group = bool(near)
        obj.tiny = max(obj.bbox[2], obj.bbox[3]) < TINY_SIDE
    record = {"width": width, "height": height, **conditions, **strength, "px_per_metre": round(u, 3),
              "rotation_deg": round(math.degrees(angle), 2), "mirrored": mirror}
    objects = [{**object_record(obj, image_id), "zone": extra.zone} for obj, extra in zip(scene.objects, drawn)]
    return pixels, record, objects


def generate(out_dir: str | Path, *, num_images: int = 300, seed: int = 0,
             fault_rates: dict[str, float] | None = None, progress: bool = True) -> DemoPaths:
    """Draw the marina scenario and write it as a COCO dataset with planted label faults.

    Parameters
    ----------
    out_dir : folder to write ``annotations.json`` (COCO, faults included), ``images/*.jpg`` and
        ``truth.json`` (clean objects, image conditions, planted faults; see ``demo/README.md``).
    num_images : how many images to draw; each gets its own size from :data:`IMAGE_SIZES`.
    seed : everything (pixels, ids, faults) follows from it; the same seed writes the same bytes.
    fault_rates : share of objects for each fault kind, keys among ``wrong_class``, ``missing_box``,
        ``loose_box``, ``duplicate_box``; missing keys keep
        :data:`~detdiff.data.scenarios.faults.HELD_OUT_FAULT_RATES` (5% each, 1% duplicates).
    progress : show a tqdm bar while drawing.

    Returns
    -------
    DemoPaths with the three paths written.
    """
    rates = check_fault_rates(fault_rates, HELD_OUT_FAULT_RATES)
    streams, images, objects = draw_images(Path(out_dir), num_images=num_images, seed=seed, stem="aerial",
                                           quality=JPEG_QUALITY, progress=progress, draw=_image)
    confusions = look_alike_confusions(NAMES, CLASS_FREQUENCY, LOOK_ALIKE_GROUPS)
    return write_dataset(out_dir, scenario=SCENARIO, seed=seed, streams=streams, categories=CATEGORIES,
                         confusions=confusions, images=images, objects=objects, rates=rates,
                         loose=LOOSE_BOXES)
