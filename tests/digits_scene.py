"""A real-image detection set from open data that packages ship: scikit-learn's handwritten digits
(UCI "Optical Recognition of Handwritten Digits", Alpaydin & Kaynak 1998) pasted on scikit-image's
CC0 textures (brick, grass, gravel). A few confusable labels are swapped; the audit should rank them high.
"""

from __future__ import annotations

import json
from pathlib import Path

import cv2
import numpy as np
import skimage.data
from sklearn.datasets import load_digits

#: digit classes used and the confusable partner each swapped label gets (common practice: 1/7, 3/8, 0/6)
DIGITS = (0, 1, 3, 6, 7, 8)
CONFUSABLE = {0: 6, 6: 0, 1: 7, 7: 1, 3: 8, 8: 3}
CATEGORY_ID = {d: 10 + 3 * d for d in DIGITS}     # non-contiguous COCO category ids


def build_digit_scenes(out_dir: Path, *, num_images: int = 160, size: int = 128, swap_fraction: float = 0.06,
                       seed: int = 0) -> tuple[Path, Path, set[int]]:
    """Write images + COCO annotations; return (annotations path, images dir, ids of swapped annotations)."""
    rng = np.random.default_rng(seed)
    digits = load_digits()
    pools = {d: digits.images[digits.target == d] for d in DIGITS}
    textures = [getattr(skimage.data, n)() for n in ("brick", "grass", "gravel")]
    images_dir = out_dir / "images"
    images_dir.mkdir(parents=True, exist_ok=True)
    images, annotations, swapped = [], [], set()
    ann_id = 501
    for k in range(num_images):
        tex = textures[k % len(textures)]
        y0, x0 = rng.integers(0, tex.shape[0] - size, 2)
        canvas = (tex[y0:y0 + size, x0:x0 + size].astype(np.float32) * 0.5).copy()
        taken = np.zeros((size, size), dtype=bool)
        for _ in range(int(rng.integers(2, 5))):
            d = DIGITS[int(rng.integers(len(DIGITS)))]
            glyph = pools[d][int(rng.integers(len(pools[d])))] / 16.0
            side = int(rng.integers(22, 40))
            glyph = cv2.resize(glyph.astype(np.float32), (side, side), interpolation=cv2.INTER_LINEAR)
            x, y = (int(v) for v in rng.integers(0, size - side, 2))
            if taken[y:y + side, x:x + side].any():
                continue
            taken[y:y + side, x:x + side] = True
            region = canvas[y:y + side, x:x + side]
            canvas[y:y + side, x:x + side] = region * (1 - glyph) + 255.0 * glyph
            ys, xs = np.nonzero(glyph > 0.2)
            bx, by = x + xs.min(), y + ys.min()
            bw, bh = xs.max() - xs.min() + 1, ys.max() - ys.min() + 1
            label = d
            if rng.random() < swap_fraction:
                label = CONFUSABLE[d]
                swapped.add(ann_id)
            annotations.append({"id": ann_id, "image_id": 3000 + 7 * k, "category_id": CATEGORY_ID[label],
                                "bbox": [float(bx), float(by), float(bw), float(bh)], "area": float(bw * bh),
                                "iscrowd": 0})
            ann_id += 1
        name = f"scene_{k:04d}.png"
        cv2.imwrite(str(images_dir / name), np.clip(canvas, 0, 255).astype(np.uint8))
        images.append({"id": 3000 + 7 * k, "file_name": name, "width": size, "height": size})
    categories = [{"id": CATEGORY_ID[d], "name": f"digit_{d}", "supercategory": "digit"} for d in DIGITS]
    ann_path = out_dir / "annotations.json"
    ann_path.write_text(json.dumps({"images": images, "annotations": annotations, "categories": categories}))
    return ann_path, images_dir, swapped
