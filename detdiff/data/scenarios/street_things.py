"""Drawings of the street-camera scenario's objects: vehicles, two-wheelers, people, signals, signs, furniture.

Each builder returns a :class:`Thing`: drawing-kit ops in image px for an object ``s`` px per metre
away, with the origin on the ground under the object and y pointing down, so the street-camera
layout puts the origin at the projected ground point. Sizes are real-world metres; colours vary
within each class, and look-alike classes differ in a detail (a roof sign, which lamp is lit, a
bar or a number on a disc, head size against height).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Callable

import numpy as np

from detdiff.data.scenarios.drawing import Op, jitter_colour, rounded_rect


def bgr(colour: Any) -> tuple[float, float, float]:
    """A colour as a cv2 tuple, clipped to 0..255."""
    return tuple(float(v) for v in np.clip(np.asarray(colour, dtype=np.float64), 0, 255))


def one_of(rng: np.random.Generator, palette: Any, spread: float) -> np.ndarray:
    """A within-class variant (see :func:`jitter_colour`) of a colour drawn from ``palette`` (BGR)."""
    return jitter_colour(rng, palette[int(rng.integers(len(palette)))], spread)


@dataclass
class Thing:
    """One object's drawing: ``ops`` (the labelled silhouette), ``props`` (pole, arm: not labelled) and an
    optional photo ``patch`` pasted inside the silhouette (local px rectangle x0, y0, x1, y1)."""

    ops: list[Op]
    props: list[Op] = field(default_factory=list)
    patch: tuple[float, float, float, float] | None = None


def box(s: float, x0: float, y0: float, x1: float, y1: float) -> np.ndarray:
    """Corners of the rectangle spanned by two corners in metres (x right, y up from the ground), in local px."""
    x0, x1 = sorted((x0, x1))
    y0, y1 = sorted((y0, y1))
    return np.array([[x0, -y1], [x1, -y1], [x1, -y0], [x0, -y0]], dtype=np.float64) * s


def poly(s: float, points: list[tuple[float, float]]) -> np.ndarray:
    """A polygon given in metres (x right, y up), in local px (y down)."""
    return np.array(points, dtype=np.float64) * [s, -s]


def px(s: float, metres: float) -> int:
    """A line thickness in px, at least 1."""
    return max(1, int(round(metres * s)))


_BODY_COLOURS = ((192, 192, 192), (235, 235, 235), (35, 35, 35), (110, 50, 30), (40, 40, 170), (120, 120, 120),
                 (50, 80, 40), (150, 170, 185), (90, 30, 60))


def car_like(rng: np.random.Generator, s: float, name: str, view: str) -> Thing:
    """Car, taxi, police car or van from behind, in front or from the side."""
    van = name == "van"
    w = float(rng.uniform(1.9, 2.05) if van else rng.uniform(1.7, 1.9))
    h = float(rng.uniform(1.95, 2.45) if van else rng.uniform(1.38, 1.55))
    if name == "taxi":
        body = jitter_colour(rng, (25, 195, 240), 8)
    elif name == "police_car":
        body = jitter_colour(rng, (235, 235, 235), 5)
    elif van:
        body = one_of(rng, ((235, 235, 235), (190, 190, 190), (120, 60, 20)), 6)
    else:
        body = one_of(rng, _BODY_COLOURS, 8)
    glass = bgr(jitter_colour(rng, (70, 60, 55), 6))
    dark = (30, 30, 32)
    ops: list[Op] = []
    if view == "side":
        length = float(rng.uniform(4.6, 5.4) if van else rng.uniform(3.9, 4.6))
        r = 0.32
        if van:
            shell = poly(s, [(-length / 2, 0.3), (length / 2, 0.3), (length / 2, 1.0), (length / 2 - 0.5, h),
                              (-length / 2, h), (-length / 2, 0.3)])
            windows = [poly(s, [(length / 2 - 1.3, 1.15), (length / 2 - 0.2, 1.15), (length / 2 - 0.55, h - 0.15),
                                 (length / 2 - 1.3, h - 0.15)])]
        else:
            shell = poly(s, [(-length / 2, 0.3), (length / 2, 0.3), (length / 2, 0.85), (length * 0.22, 0.95),
                              (length * 0.08, h), (-length * 0.28, h), (-length * 0.42, 0.95),
                              (-length / 2, 0.9)])
            windows = [poly(s, [(length * 0.18, 1.0), (length * 0.07, h - 0.06), (-0.05, h - 0.06), (-0.05, 1.0)]),
                       poly(s, [(-0.15, 1.0), (-0.15, h - 0.06), (-length * 0.26, h - 0.06),
                                 (-length * 0.37, 1.0)])]
        ops.append(Op("poly", shell, bgr(body)))
        ops += [Op("poly", p, glass, inner=True) for p in windows]
        for x in (-length / 2 + 0.8, length / 2 - 0.8):
            ops.append(Op("circle", np.array([[x * s, -r * s]]), dark, radius=r * s))
            ops.append(Op("circle", np.array([[x * s, -r * s]]), (150, 150, 150), radius=0.5 * r * s, inner=True))
        if name == "police_car":
            ops.append(Op("poly", box(s, -length / 2, 0.5, length / 2, 0.7), (200, 90, 20), inner=True))
            ops.append(Op("poly", box(s, -length * 0.12, h, length * 0.02, h + 0.12), (220, 60, 30)))
        if name == "taxi":
            ops.append(Op("poly", box(s, -length * 0.12, h, length * 0.05, h + 0.17), (235, 245, 250)))
            ops.append(Op("line", poly(s, [(-length / 2, 0.6), (length / 2, 0.6)]), (40, 40, 40), px(s, 0.08),
                          inner=True))
        return Thing(ops)
    roof = w * (0.92 if van else 0.68)
    ops.append(Op("poly", box(s, -w / 2 + 0.1, 0.0, -w / 2 + 0.35, 0.45), dark))
    ops.append(Op("poly", box(s, w / 2 - 0.35, 0.0, w / 2 - 0.1, 0.45), dark))
    if van:
        ops.append(Op("poly", rounded_rect(w * s, (h - 0.3) * s, 0.12 * s, 0.0, -(0.3 + (h - 0.3) / 2) * s),
                      bgr(body)))
    else:
        ops.append(Op("poly", box(s, -w / 2, 0.3, w / 2, 0.95), bgr(body)))
        ops.append(Op("poly", poly(s, [(-w * 0.46, 0.95), (w * 0.46, 0.95), (roof / 2, h), (-roof / 2, h)]),
                      bgr(body * 0.92)))
    top = h - 0.08
    if view == "front":
        low = 1.2 if van else top - 0.55
        ops.append(Op("poly", poly(s, [(-w * 0.42, low), (w * 0.42, low), (roof / 2 - 0.05, top),
                                        (-roof / 2 + 0.05, top)]), glass, inner=True))
        lamp = (200, 235, 245)
        ops.append(Op("poly", box(s, -w * 0.28, 0.45, w * 0.28, 0.62), (40, 40, 40), inner=True))
    else:
        y_glass = 1.25 if van else 1.0
        if van:
            ops.append(Op("poly", box(s, -w * 0.42, y_glass, -0.05, top - 0.15), glass, inner=True))
            ops.append(Op("poly", box(s, 0.05, y_glass, w * 0.42, top - 0.15), glass, inner=True))
            ops.append(Op("line", poly(s, [(0.0, 0.35), (0.0, top)]), bgr(body * 0.6), px(s, 0.03), inner=True))
        else:
            ops.append(Op("poly", poly(s, [(-w * 0.4, y_glass), (w * 0.4, y_glass), (roof / 2 - 0.08, top - 0.04),
                                            (-roof / 2 + 0.08, top - 0.04)]), glass, inner=True))
        lamp = (30, 30, 200)
    for sign in (-1, 1):
        ops.append(Op("poly", box(s, sign * (w / 2 - 0.05), 0.68, sign * (w / 2 - 0.32), 0.86), lamp,
                      inner=True))
    ops.append(Op("poly", box(s, -0.26, 0.36, 0.26, 0.48), (235, 235, 235) if view == "front" else (40, 200, 235),
                  inner=True))
    ops.append(Op("poly", box(s, -w / 2, 0.26, w / 2, 0.34), (45, 45, 45), inner=True))
    if name == "taxi":
        ops.append(Op("poly", box(s, -0.3, h, 0.3, h + 0.17), (235, 245, 250)))
    if name == "police_car":
        ops.append(Op("poly", box(s, -0.55, h, 0.0, h + 0.12), (220, 60, 30)))
        ops.append(Op("poly", box(s, 0.0, h, 0.55, h + 0.12), (40, 40, 220)))
        for k in range(6):
            x = -w / 2 + k * w / 6
            ops.append(Op("poly", box(s, x, 0.55, x + w / 12, 0.66), (200, 90, 20), inner=True))
    return Thing(ops)


def large_vehicle(rng: np.random.Generator, s: float, name: str, view: str) -> Thing:
    """Bus, tram or lorry from behind, in front or from the side (bus and tram sides carry a photo advert)."""
    dark = (30, 30, 32)
    glass = bgr(jitter_colour(rng, (75, 65, 55), 6))
    if name == "bus":
        body = one_of(rng, ((40, 40, 190), (160, 90, 30), (60, 130, 50), (210, 210, 210)), 8)
        w, h, length = 2.5, float(rng.uniform(3.0, 3.3)), float(rng.uniform(10, 12.5))
    elif name == "tram":
        body = one_of(rng, ((60, 180, 230), (60, 60, 200), (200, 200, 200)), 8)
        w, h, length = 2.4, float(rng.uniform(3.3, 3.6)), float(rng.uniform(14, 22))
    else:
        body = one_of(rng, ((220, 220, 220), (60, 60, 160), (150, 110, 40), (80, 160, 210)), 8)
        w, h, length = 2.5, float(rng.uniform(3.4, 4.0)), float(rng.uniform(8, 11))
    ops: list[Op] = []
    patch = None
    if view == "side":
        if name == "truck":
            cab = 2.2
            ops.append(Op("poly", box(s, -length / 2, 0.5, length / 2 - cab - 0.1, h), bgr(body)))
            ops.append(Op("poly", poly(s, [(length / 2 - cab, 0.5), (length / 2, 0.5), (length / 2, 2.2),
                                            (length / 2 - 0.4, 3.0), (length / 2 - cab, 3.0)]), bgr(body * 0.8)))
            ops.append(Op("poly", box(s, length / 2 - 1.2, 1.9, length / 2 - 0.3, 2.7), glass, inner=True))
            wheels = (-length / 2 + 1.2, -length / 2 + 2.4, length / 2 - 1.3)
        else:
            corner = 0.15 if name == "bus" else 0.6
            ops.append(Op("poly", rounded_rect(length * s, (h - 0.3) * s, corner * s, 0.0, -(0.3 + (h - 0.3) / 2) * s),
                          bgr(body)))
            ops.append(Op("poly", box(s, -length / 2 + 0.4, 1.8, length / 2 - 0.4, h - 0.35), glass, inner=True))
            for x in np.arange(-length / 2 + 1.6, length / 2 - 0.5, 1.6):
                ops.append(Op("line", poly(s, [(x, 1.8), (x, h - 0.35)]), bgr(body), px(s, 0.08), inner=True))
            ops.append(Op("poly", box(s, length / 2 - 2.2, 0.35, length / 2 - 1.2, 2.7), glass, inner=True))
            if name == "tram":
                ops.append(Op("line", poly(s, [(-1.2, h), (0.0, h + 0.9), (1.2, h)]), dark, px(s, 0.06)))
            patch = tuple(float(v) for v in box(s, -length / 2 + 1.2, 0.75, length / 2 - 3.0, 1.65)[[0, 2]].ravel())
            wheels = (-length / 2 + 2.2, length / 2 - 2.8) if name == "bus" else ()
        for x in wheels:
            ops.append(Op("circle", np.array([[x * s, -0.5 * s]]), dark, radius=0.5 * s))
        return Thing(ops, patch=patch)
    ops.append(Op("poly", box(s, -w / 2 + 0.15, 0.0, -w / 2 + 0.5, 0.6), dark))
    ops.append(Op("poly", box(s, w / 2 - 0.5, 0.0, w / 2 - 0.15, 0.6), dark))
    corner = 0.12 if name != "tram" else 0.5
    ops.append(Op("poly", rounded_rect(w * s, (h - 0.3) * s, corner * s, 0.0, -(0.3 + (h - 0.3) / 2) * s), bgr(body)))
    if name == "truck" and view == "rear":
        ops.append(Op("line", poly(s, [(0.0, 0.6), (0.0, h - 0.1)]), bgr(body * 0.6), px(s, 0.04), inner=True))
        for k in range(5):
            x = -w / 2 + k * w / 5
            ops.append(Op("poly", poly(s, [(x, 0.3), (x + w / 10, 0.3), (x + w / 5, 0.55), (x + w / 10, 0.55)]),
                          (40, 40, 200), inner=True))
    elif view == "front" or name == "tram":
        ops.append(Op("poly", box(s, -w * 0.44, 1.2 if name != "truck" else 1.9, w * 0.44, h - 0.5), glass, inner=True))
        if name == "bus" or name == "tram":
            ops.append(Op("poly", box(s, -w * 0.35, h - 0.45, w * 0.35, h - 0.15), (20, 150, 240), inner=True))
        if name == "tram":
            ops.append(Op("line", poly(s, [(-0.6, h), (0.0, h + 0.9), (0.6, h)]), dark, px(s, 0.06)))
    else:
        ops.append(Op("poly", box(s, -w * 0.4, 2.0, w * 0.4, h - 0.35), glass, inner=True))
        ops.append(Op("poly", box(s, -w * 0.3, 0.5, w * 0.3, 1.1), bgr(body * 0.5), inner=True))
    lamp = (200, 235, 245) if view == "front" else (30, 30, 200)
    for sign in (-1, 1):
        ops.append(Op("poly", box(s, sign * (w / 2 - 0.1), 0.55, sign * (w / 2 - 0.35), 0.75), lamp,
                      inner=True))
    return Thing(ops)


def two_wheeler(rng: np.random.Generator, s: float, name: str, view: str) -> Thing:
    """Bicycle, motorcycle or scooter from the side, facing left or right."""
    dark = (25, 25, 25)
    frame = bgr(one_of(rng, ((40, 40, 180), (150, 90, 30), (30, 30, 30), (200, 200, 200), (40, 140, 40)), 10))
    ops: list[Op] = []
    if name == "bicycle":
        r, half = 0.34, 0.52
        for x in (-half, half):
            ops.append(Op("circle", np.array([[x * s, -r * s]]), dark, px(s, 0.035), radius=r * s))
        pts = [(-half, r), (-0.08, r), (0.3, 0.82), (-0.2, 0.8), (-half, r)]
        ops.append(Op("line", poly(s, pts), frame, px(s, 0.035)))
        ops.append(Op("line", poly(s, [(-0.08, r), (-0.22, 0.9), (-0.3, 0.92), (-0.1, 0.92)]), frame, px(s, 0.03)))
        ops.append(Op("line", poly(s, [(half, r), (0.3, 0.82), (0.28, 1.0), (0.18, 1.02)]), frame, px(s, 0.03)))
    elif name == "motorcycle":
        r, half = 0.31, 0.7
        for x in (-half, half):
            ops.append(Op("circle", np.array([[x * s, -r * s]]), dark, radius=r * s))
            ops.append(Op("circle", np.array([[x * s, -r * s]]), (140, 140, 140), radius=0.45 * r * s, inner=True))
        ops.append(Op("poly", poly(s, [(-0.5, 0.45), (0.35, 0.45), (0.5, 0.8), (0.2, 0.95), (-0.55, 0.85)]), frame))
        ops.append(Op("poly", box(s, -0.2, 0.3, 0.2, 0.6), (60, 60, 60)))
        ops.append(Op("line", poly(s, [(half, r), (0.5, 0.95), (0.42, 1.1)]), (150, 150, 150), px(s, 0.05)))
        ops.append(Op("poly", box(s, -0.55, 0.85, 0.0, 0.95), dark, inner=True))
    else:
        r, half = 0.22, 0.62
        for x in (-half, half):
            ops.append(Op("circle", np.array([[x * s, -r * s]]), dark, radius=r * s))
        ops.append(Op("poly", poly(s, [(-0.75, 0.3), (0.25, 0.3), (0.4, 0.95), (0.55, 1.0), (0.6, 0.3),
                                        (0.72, 0.35), (0.6, 1.15), (0.35, 1.1), (0.1, 0.45), (-0.25, 0.45),
                                        (-0.3, 0.75), (-0.8, 0.7)]), frame))
        ops.append(Op("poly", box(s, -0.72, 0.72, -0.22, 0.82), dark, inner=True))
    if rng.random() < 0.5:
        for op in ops:
            op.points = op.points * [-1.0, 1.0]
    return Thing(ops)


_SKIN = ((140, 170, 220), (110, 140, 190), (70, 95, 140), (45, 65, 100))


def person(rng: np.random.Generator, s: float, name: str, view: str) -> Thing:
    """Adult or child pedestrian, seen from the front/back or from the side (walking)."""
    child = name == "pedestrian_child"
    h = float(rng.uniform(1.0, 1.35) if child else rng.uniform(1.58, 1.92))
    head = h * (0.095 if child else 0.066)
    skin = bgr(one_of(rng, _SKIN, 6))
    coat = bgr(one_of(rng, ((40, 40, 40), (120, 70, 30), (40, 40, 160), (160, 160, 160), (50, 110, 60),
                            (60, 170, 230), (150, 60, 130)), 12))
    legs = bgr(one_of(rng, ((30, 30, 30), (110, 60, 30), (100, 100, 100), (160, 170, 180)), 10))
    hip = h * (0.44 if child else 0.48)
    neck = h - 2 * head
    shoulder = h * (0.115 if child else 0.125)
    leg_w = h * 0.055
    ops: list[Op] = []
    if view == "side":
        stride = h * float(rng.uniform(0.05, 0.16))
        for foot in (-stride, stride):
            ops.append(Op("line", poly(s, [(0.0, hip), (foot, 0.03)]), legs, px(s, leg_w * 1.6)))
        ops.append(Op("poly", poly(s, [(-shoulder * 0.55, hip), (shoulder * 0.55, hip), (shoulder * 0.5, neck),
                                        (-shoulder * 0.5, neck)]), coat))
        ops.append(Op("line", poly(s, [(0.0, neck - 0.03), (stride * 0.8, hip - 0.05)]), coat, px(s, h * 0.045)))
    else:
        for sign in (-1, 1):
            ops.append(Op("poly", box(s, sign * 0.01, 0.0, sign * (0.01 + leg_w * 1.4), hip), legs))
        ops.append(Op("poly", poly(s, [(-shoulder * 0.8, hip), (shoulder * 0.8, hip), (shoulder, neck - 0.02),
                                        (-shoulder, neck - 0.02)]), coat))
        for sign in (-1, 1):
            ops.append(Op("line", poly(s, [(sign * shoulder * 0.95, neck - 0.04), (sign * shoulder * 1.05,
                                                                                    hip - 0.02)]),
                          coat, px(s, h * 0.045)))
            ops.append(Op("circle", np.array([[sign * shoulder * 1.05 * s, -(hip - 0.03) * s]]), skin,
                          radius=h * 0.022 * s))
        if child and rng.random() < 0.6:
            ops.append(Op("poly", box(s, -shoulder * 0.7, hip + 0.05, shoulder * 0.7, neck - 0.05),
                          bgr(jitter_colour(rng, (40, 180, 230), 30)), inner=True))
    ops.append(Op("line", poly(s, [(0.0, neck - 0.02), (0.0, neck + 0.03)]), skin, px(s, head * 0.8)))
    ops.append(Op("circle", np.array([[0.0, -(h - head) * s]]), skin, radius=head * s))
    hair = bgr(one_of(rng, ((30, 30, 40), (40, 70, 110), (120, 160, 200), (180, 180, 180)), 8))
    ops.append(Op("poly", poly(s, [(-head, h - head), (-head * 0.7, h - head * 0.3), (0.0, h),
                                    (head * 0.7, h - head * 0.3), (head, h - head)]), hair, inner=True))
    if not child and rng.random() < 0.3:
        bag = bgr(jitter_colour(rng, (50, 60, 90), 15))
        ops.append(Op("poly", box(s, shoulder * 1.0, hip - 0.25, shoulder * 1.0 + 0.22, hip + 0.05), bag))
    return Thing(ops)


def traffic_light(rng: np.random.Generator, s: float, name: str, view: str) -> Thing:
    """Three-lamp signal head on a pole (or hung over the road); one lamp lit, the others dark."""
    bottom = float(rng.uniform(5.0, 5.8) if view == "overhead" else rng.uniform(2.3, 3.0))
    w, h = 0.34, 0.95
    lit = {"light_red": 0, "light_amber": 1, "light_green": 2}[name]
    colours = ((40, 40, 250), (20, 175, 255), (170, 235, 40))
    housing = bgr(jitter_colour(rng, (35, 35, 35), 6))
    ops = [Op("poly", rounded_rect(w * s, h * s, 0.06 * s, 0.0, -(bottom + h / 2) * s), housing)]
    if rng.random() < 0.5:
        ops.insert(0, Op("poly", rounded_rect((w + 0.2) * s, (h + 0.12) * s, 0.05 * s, 0.0,
                                              -(bottom + h / 2) * s), (230, 230, 230)))
        ops.insert(1, Op("poly", rounded_rect((w + 0.14) * s, (h + 0.06) * s, 0.05 * s, 0.0,
                                              -(bottom + h / 2) * s), (25, 25, 25)))
    for k, colour in enumerate(colours):
        y = bottom + h - 0.17 - k * 0.3
        c = colour if k == lit else tuple(0.22 * v + 20 for v in colour)
        ops.append(Op("circle", np.array([[0.0, -y * s]]), c, radius=0.1 * s, inner=True))
    pole = (95, 95, 95)
    if view == "overhead":
        arm = float(rng.uniform(2.5, 5.0)) * (1 if rng.random() < 0.5 else -1)
        props = [Op("line", poly(s, [(0.0, bottom + h), (0.0, bottom + h + 0.3), (arm, bottom + h + 0.3)]), pole,
                    px(s, 0.1))]
    else:
        props = [Op("line", poly(s, [(0.0, 0.0), (0.0, bottom)]), pole, px(s, 0.11))]
    return Thing(ops, props)


def _digits(s: float, cx: float, cy: float, size: float, number: str) -> list[np.ndarray]:
    """Stroke polylines (metres to px) of a two-digit number drawn like a seven-segment display."""
    segments = {"0": "abcdef", "2": "abged", "3": "abgcd", "4": "fgbc", "5": "afgcd", "6": "afgedc", "8": "abcdefg"}
    w, h = size * 0.45, size
    ends = {"a": ((0, 1), (1, 1)), "b": ((1, 1), (1, 0.5)), "c": ((1, 0.5), (1, 0)), "d": ((0, 0), (1, 0)),
            "e": ((0, 0.5), (0, 0)), "f": ((0, 1), (0, 0.5)), "g": ((0, 0.5), (1, 0.5))}
    lines = []
    for k, digit in enumerate(number):
        x0 = cx + (k - len(number) / 2) * w * 1.5 + w * 0.25
        for seg in segments[digit]:
            (ax, ay), (bx, by) = ends[seg]
            lines.append(poly(s, [(x0 + ax * w, cy - h / 2 + ay * h), (x0 + bx * w, cy - h / 2 + by * h)]))
    return lines


def sign(rng: np.random.Generator, s: float, name: str, view: str) -> Thing:
    """Road sign on a pole: speed limit, no entry, no parking (discs), give way (triangle), stop (octagon)."""
    d = float(rng.uniform(0.6, 0.75))
    bottom = float(rng.uniform(1.9, 2.6))
    cy = bottom + d / 2
    red, white, blue = (40, 40, 200), (240, 240, 240), (170, 80, 20)
    centre = np.array([[0.0, -cy * s]])
    r = d / 2 * s
    if name == "sign_give_way":
        tri = poly(s, [(-d / 2, bottom + d * 0.87), (d / 2, bottom + d * 0.87), (0.0, bottom)])
        inner = poly(s, [(-d * 0.33, bottom + d * 0.78), (d * 0.33, bottom + d * 0.78), (0.0, bottom + d * 0.2)])
        ops = [Op("poly", tri, red), Op("poly", inner, white, inner=True)]
    elif name == "sign_stop":
        angles = (np.arange(8) + 0.5) * math.pi / 4
        octagon = np.stack([np.cos(angles), np.sin(angles)], 1) * r + centre
        ops = [Op("poly", octagon, red), Op("poly", (octagon - centre) * 0.9 + centre, white, inner=True),
               Op("poly", (octagon - centre) * 0.82 + centre, red, inner=True)]
        for k in range(4):
            x = (-0.21 + 0.14 * k) * d
            ops.append(Op("line", poly(s, [(x, cy - 0.08 * d), (x, cy + 0.08 * d)]), white, px(s, 0.05 * d),
                          inner=True))
    elif name == "sign_no_entry":
        ops = [Op("circle", centre, red, radius=r),
               Op("poly", box(s, -d * 0.36, cy - d * 0.09, d * 0.36, cy + d * 0.09), white, inner=True)]
    elif name == "sign_no_parking":
        ops = [Op("circle", centre, red, radius=r), Op("circle", centre, blue, radius=r * 0.8, inner=True),
               Op("line", poly(s, [(-d * 0.28, cy + d * 0.28), (d * 0.28, cy - d * 0.28)]), red, px(s, d * 0.12),
                  inner=True)]
    else:
        ops = [Op("circle", centre, red, radius=r), Op("circle", centre, white, radius=r * 0.78, inner=True)]
        number = ("20", "30", "40", "50", "60", "80")[int(rng.integers(6))]
        ops += [Op("line", p, (20, 20, 20), px(s, d * 0.06), inner=True)
                for p in _digits(s, 0.0, cy, d * 0.42, number)]
    props = [Op("line", poly(s, [(0.0, 0.0), (0.0, bottom + 0.05)]), (130, 130, 130), px(s, 0.07))]
    return Thing(ops, props)


def furniture(rng: np.random.Generator, s: float, name: str, view: str) -> Thing:
    """Litter bin, post box, bollard or traffic cone."""
    if name == "litter_bin":
        w, h = float(rng.uniform(0.45, 0.6)), float(rng.uniform(0.85, 1.05))
        body = bgr(one_of(rng, ((40, 80, 30), (30, 30, 30), (110, 110, 110), (30, 40, 110)), 8))
        return Thing([Op("poly", box(s, -w / 2, 0.0, w / 2, h), body),
                      Op("poly", poly(s, [(-w / 2 - 0.03, h), (w / 2 + 0.03, h), (w * 0.35, h + 0.1),
                                           (-w * 0.35, h + 0.1)]), bgr(np.asarray(body) * 0.7)),
                      Op("poly", box(s, -w * 0.35, h - 0.22, w * 0.35, h - 0.1), (15, 15, 15), inner=True)])
    if name == "post_box":
        w, h = float(rng.uniform(0.5, 0.6)), float(rng.uniform(1.3, 1.5))
        red = bgr(jitter_colour(rng, (30, 30, 190), 8))
        return Thing([Op("poly", box(s, -w / 2, 0.0, w / 2, h - w / 2), red),
                      Op("circle", np.array([[0.0, -(h - w / 2) * s]]), red, radius=w / 2 * s),
                      Op("poly", box(s, -w / 2 - 0.03, h - w / 2 - 0.06, w / 2 + 0.03, h - w / 2), (25, 25, 25)),
                      Op("poly", box(s, -w * 0.3, h - w / 2 - 0.25, w * 0.3, h - w / 2 - 0.18), (20, 20, 20),
                         inner=True),
                      Op("poly", box(s, -w * 0.22, h - w / 2 - 0.55, w * 0.22, h - w / 2 - 0.35), (230, 230, 230),
                         inner=True)])
    if name == "bollard":
        w, h = float(rng.uniform(0.14, 0.2)), float(rng.uniform(0.85, 1.05))
        body = bgr(one_of(rng, ((40, 40, 40), (120, 120, 120), (20, 100, 200)), 8))
        return Thing([Op("poly", rounded_rect(w * s, h * s, w / 2 * s, 0.0, -h / 2 * s), body),
                      Op("poly", box(s, -w / 2, h - 0.25, w / 2, h - 0.15), (220, 235, 240), inner=True)])
    w, h = float(rng.uniform(0.3, 0.4)), float(rng.uniform(0.5, 0.75))
    orange = bgr(jitter_colour(rng, (20, 100, 240), 10))
    ops = [Op("poly", box(s, -w * 0.8, 0.0, w * 0.8, 0.05), (30, 30, 30)),
           Op("poly", poly(s, [(-w / 2, 0.04), (w / 2, 0.04), (0.04, h), (-0.04, h)]), orange)]
    for y in (0.35, 0.6):
        half = w / 2 * (1 - y) + 0.04 * y
        ops.append(Op("poly", poly(s, [(-half, (y - 0.07) * h), (half, (y - 0.07) * h), (half * 0.9, (y + 0.05) * h),
                                        (-half * 0.9, (y + 0.05) * h)]), (235, 235, 235), inner=True))
    return Thing(ops)


def tree(rng: np.random.Generator, s: float) -> Thing:
    """A street tree (not a class): trunk and a crown of overlapping discs, filled from the grass photo."""
    trunk_h, crown = float(rng.uniform(2.5, 4.0)), float(rng.uniform(1.5, 2.8))
    discs = [Op("circle", np.array([[x * s, -(trunk_h + crown + y) * s]]), (60, 110, 60), radius=r * s)
             for x, y, r in zip(rng.normal(0, crown * 0.4, 5), rng.normal(0, crown * 0.3, 5),
                                rng.uniform(0.6, 1.0, 5) * crown)]
    trunk = Op("line", poly(s, [(0.0, 0.0), (0.0, trunk_h + crown)]), (40, 55, 70), px(s, 0.25))
    return Thing([trunk] + discs)


#: Builder of each look-alike group; each takes (rng, px per metre, class name, view).
BUILDERS: dict[str, Callable[[np.random.Generator, float, str, str], Thing]] = {
    "car_like": car_like, "large_vehicle": large_vehicle, "two_wheeler": two_wheeler, "person": person,
    "traffic_light": traffic_light, "round_sign": sign, "street_furniture": furniture}
