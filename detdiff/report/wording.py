"""Names and numbers in words: the titles of the loss streams and descriptors, AP, shares and fractions.

Shared by the sentences (:mod:`detdiff.report.advice`), the terminal summary, the plots and the HTML page.
"""

from __future__ import annotations

import math
from typing import Any

STREAM_TITLES: dict[str, str] = {"loc": "Box regression", "pos": "Positive class", "neg": "Background class"}
#: how a stream is named inside a sentence ("... among the hardest tenth for <this> ...")
STREAM_PHRASES: dict[str, str] = {"loc": "box regression", "pos": "the positive-class loss",
                                  "neg": "the background-class loss"}

#: descriptor column -> words used in sentences
DESCRIPTOR_WORDS: dict[str, str] = {
    "box_count": "box count", "crowding": "crowding", "blur_laplacian_var": "sharpness (Laplacian variance)",
    "brightness": "brightness", "contrast": "contrast", "clutter_edge_density": "background clutter (edge density)",
    "resolution": "resolution", "area": "area", "size_bin": "size", "rel_size": "size relative to the image",
    "aspect": "aspect ratio", "max_iou": "overlap with another box (max IoU)", "occlusion": "occlusion",
    "truncation": "truncation", "class_freq": "class frequency", "feature_dist": "distance from the class centre",
    "elongation": "elongation",
}
_FRACTION_WORDS = {0.5: "half", 0.25: "quarter", 0.2: "fifth", 0.1: "tenth", 0.05: "twentieth", 0.01: "hundredth"}


def format_ap(value: Any) -> str:
    """AP as ``0.412``; COCOeval's ``-1`` (no object in that bin) and missing values as ``n/a``."""
    if not isinstance(value, (int, float)) or isinstance(value, bool) or not math.isfinite(value) or value < 0:
        return "n/a"
    return f"{value:.3f}"


def format_percent(rate: float) -> str:
    """A share (0-1) as ``31%``; ``0.4%`` below one percent. Values above 1 are taken as percents already."""
    if not math.isfinite(rate):
        return "n/a"
    percent = rate if rate > 1 else 100 * rate
    return f"{percent:.1f}%" if 0 < percent < 1 else f"{percent:.0f}%"


def fraction_words(fraction: float) -> str:
    """``0.1`` -> ``tenth`` (the hardest tenth), otherwise ``12%``."""
    for value, word in _FRACTION_WORDS.items():
        if math.isclose(fraction, value):
            return word
    return format_percent(fraction)


def descriptor_words(descriptor: str) -> str:
    """The words for a descriptor column in sentences (``clutter_edge_density`` -> ``background clutter ...``)."""
    return DESCRIPTOR_WORDS.get(descriptor, descriptor.replace("_", " "))
