"""The measuring instrument: a small single-stage anchor detector that trains fast on two CPU cores.

Layout (chosen by measured time on CPU, not by FLOP count: dense convolutions, few channels, no depthwise):

* stem: one 4x4 stride-4 convolution (patchify) of the normalised image + ReLU, without BatchNorm
  (the next layer normalises)
* backbone stages (all BN + ReLU): to stride 8 a 2x2 stride-2 conv (patch merge); from stride 16 on a 3x3
  stride-2 conv followed by a 3x3 conv; channels ``width * (1, 2, 3, 4, ...)`` at strides 4, 8, 16, 32, ...
* neck: 1x1 lateral convs to ``head_width`` and a top-down sum (feature pyramid) -> ``[P3, P4, P5]``
* head: ``head_depth`` shared 3x3 convs + ReLU, then one shared 1x1 predictor giving, per anchor,
  ``C`` class logits and 4 box offsets (see :mod:`detdiff.model.box_coder`).

What the measurements on two shared CPU cores said (training step at 256 px, batch 16, interleaved runs):
channels-last memory format made the step 1.7x faster; BatchNorm after the stride-4 stem cost ~16% of the
step, a 3x3 predictor ~15%, a second 3x3 conv at stride 8 ~20%, a 3x3 instead of a 2x2 stride-2 conv into
stride 8 ~8% (neither improved learning on the demo scenario), and six anchors per location instead of
three ~35% (the loss is per anchor).

Precision (``train.precision``, resolved by the recipe from steps timed both ways on this machine): in training
mode the forward pass may run in bfloat16 (:mod:`detdiff.model.precision`); the 1x1 predictor always runs in
float32, so the logits and offsets the loss streams are computed from keep float32's resolution. Eval mode (the
final pass and the evaluation) is float32.

Inputs are ``float [B, 3, S, S]`` in ``0..1`` (normalised inside the model); outputs follow the anchor order of
:func:`detdiff.model.anchors.make_anchors`.
"""

from __future__ import annotations

import logging
import math
import pickle
from collections.abc import Sequence
from pathlib import Path
from typing import Any

import torch
from torch import nn
import torch.nn.functional as F

from detdiff.model.anchors import anchor_grid
from detdiff.model.precision import training_autocast

log = logging.getLogger(__name__)

STEM_STRIDE = 4
#: Prior probability of "object" for the class logits at initialisation (Lin et al., Focal Loss, ICCV 2017, §4.1).
PRIOR_PROBABILITY = 0.01


def conv_bn_relu(cin: int, cout: int, kernel: int, stride: int = 1) -> nn.Sequential:
    """Dense conv (no bias) + BatchNorm + ReLU; padding keeps ``size / stride`` exact for even sizes."""
    padding = (kernel - 1) // 2 if kernel % 2 else 0
    return nn.Sequential(nn.Conv2d(cin, cout, kernel, stride, padding, bias=False), nn.BatchNorm2d(cout),
                         nn.ReLU(inplace=True))


class NormalisedPatchify(nn.Conv2d):
    """The stem: a ``k x k`` stride-``k`` conv applied to ``(x - 0.5) * 4`` for ``x`` in 0..1.

    The normalisation is folded into the weights (``W' = 4 W``, ``b' = b - 2 sum W``), which gives the same
    result and gradients as normalising the images without writing a normalised copy of the batch.
    """

    def __init__(self, out_channels: int, patch: int) -> None:
        super().__init__(3, out_channels, patch, patch)

    def forward(self, images: torch.Tensor) -> torch.Tensor:
        weight = self.weight * 4.0
        bias = self.bias - 2.0 * self.weight.sum((1, 2, 3))
        return F.conv2d(images, weight, bias, self.stride)


class Backbone(nn.Module):
    """Patchify stem + stride-2 stages; returns the feature maps at ``strides`` (ascending)."""

    def __init__(self, width: int, strides: Sequence[int]) -> None:
        super().__init__()
        self.strides = tuple(int(s) for s in strides)
        if list(self.strides) != sorted(set(self.strides)) or any(
                s < 2 * STEM_STRIDE or s & (s - 1) for s in self.strides):
            raise ValueError(f"model.strides must be ascending powers of two >= {2 * STEM_STRIDE}, "
                             f"got {list(strides)}")
        self.stem = nn.Sequential(NormalisedPatchify(width, STEM_STRIDE), nn.ReLU(inplace=True))
        stages, cin, stride, mult = [], width, STEM_STRIDE, 1
        self.channels: list[int] = []
        while stride < self.strides[-1]:
            stride, mult = stride * 2, mult + 1
            cout = width * mult
            if stride == 2 * STEM_STRIDE:                # a 2x2 patch merge: 40% cheaper than 3x3, learns as well
                layers = [conv_bn_relu(cin, cout, 2, 2)]
            else:
                layers = [conv_bn_relu(cin, cout, 3, 2), conv_bn_relu(cout, cout, 3)]
            stages.append(nn.Sequential(*layers))
            if stride in self.strides:
                self.channels.append(cout)
            cin = cout
        self.stages = nn.ModuleList(stages)
        self._stage_strides = [STEM_STRIDE * 2 ** (k + 1) for k in range(len(stages))]

    def forward(self, x: torch.Tensor) -> list[torch.Tensor]:
        x = self.stem(x)
        out = []
        for stride, stage in zip(self._stage_strides, self.stages):
            x = stage(x)
            if stride in self.strides:
                out.append(x)
        return out


class Neck(nn.Module):
    """1x1 laterals to ``head_width`` and a top-down nearest-upsample sum (a minimal feature pyramid)."""

    def __init__(self, in_channels: Sequence[int], head_width: int) -> None:
        super().__init__()
        self.laterals = nn.ModuleList(nn.Conv2d(c, head_width, 1) for c in in_channels)

    def forward(self, feats: list[torch.Tensor]) -> list[torch.Tensor]:
        out = [lat(f) for lat, f in zip(self.laterals, feats)]
        for k in range(len(out) - 2, -1, -1):
            out[k] = out[k] + F.interpolate(out[k + 1], size=out[k].shape[-2:], mode="nearest")
        return out


class Head(nn.Module):
    """Shared across levels: ``depth`` 3x3 conv + ReLU, then one 1x1 predictor of ``A * (C + 4)`` channels."""

    def __init__(self, head_width: int, depth: int, num_anchors: int, num_classes: int) -> None:
        super().__init__()
        self.num_anchors, self.num_classes = num_anchors, num_classes
        self.tower = nn.Sequential(*[m for _ in range(depth)
                                     for m in (nn.Conv2d(head_width, head_width, 3, padding=1), nn.ReLU(inplace=True))])
        self.predictor = nn.Conv2d(head_width, num_anchors * (num_classes + 4), 1)
        nn.init.normal_(self.predictor.weight, std=0.01)
        bias = torch.zeros(num_anchors, num_classes + 4)
        bias[:, :num_classes] = -math.log((1 - PRIOR_PROBABILITY) / PRIOR_PROBABILITY)
        with torch.no_grad():
            self.predictor.bias.copy_(bias.reshape(-1))

    def forward(self, feats: list[torch.Tensor]) -> tuple[torch.Tensor, torch.Tensor]:
        """``[B, N, C]`` logits and ``[B, N, 4]`` offsets, levels concatenated in anchor order."""
        logits, deltas = [], []
        for f in feats:
            tower = self.tower(f)
            with torch.autocast(f.device.type, enabled=False):           # float32 whatever the pass's precision
                p = self.predictor(tower.float())                        # [B, A*(C+4), H, W]
            b, _, h, w = p.shape
            p = p.permute(0, 2, 3, 1).reshape(b, h * w * self.num_anchors, self.num_classes + 4)
            logits.append(p[..., :self.num_classes])
            deltas.append(p[..., self.num_classes:])
        return torch.cat(logits, dim=1), torch.cat(deltas, dim=1)


class Detector(nn.Module):
    """Single-stage detector: ``forward(images [B,3,S,S] in 0..1) -> {"cls_logits", "box_deltas", "features"}``.

    ``cls_logits [B, N, C]``, ``box_deltas [B, N, 4]`` (offsets from ``self.anchors``, a ``[N, 4]`` xyxy
    view-pixel buffer), ``features`` = the pyramid ``[P3, P4, P5]`` (``[B, head_width, S/s, S/s]``).
    """

    def __init__(self, num_classes: int, image_size: int, *, width: int = 32, head_width: int = 64,
                 head_depth: int = 1, strides: Sequence[int] = (8, 16, 32),
                 anchor_sizes: Sequence[float] = (20, 40, 80), anchor_scales: Sequence[float] = (0.5, 1.0, 1.6),
                 anchor_ratios: Sequence[float] = (1.0,),
                 anchor_shapes: Sequence[Sequence[Sequence[float]]] | None = None,
                 precision: str = "float32") -> None:
        super().__init__()
        training_autocast(precision, "train.precision")                  # checks the value
        self.precision = precision
        if num_classes < 1:
            raise ValueError(f"num_classes must be >= 1, got {num_classes}")
        self.num_classes, self.image_size = int(num_classes), int(image_size)
        self.strides = tuple(int(s) for s in strides)
        self.settings = dict(width=width, head_width=head_width, head_depth=head_depth, strides=list(strides),
                             anchor_sizes=list(anchor_sizes), anchor_scales=list(anchor_scales),
                             anchor_ratios=list(anchor_ratios),
                             anchor_shapes=None if anchor_shapes is None else [[list(map(float, wh)) for wh in lvl]
                                                                               for lvl in anchor_shapes])
        self.anchor_grid = anchor_grid(image_size, strides, anchor_sizes, anchor_scales, anchor_ratios, anchor_shapes)
        self.register_buffer("anchors", self.anchor_grid.boxes(), persistent=False)
        self.backbone = Backbone(width, strides)
        self.neck = Neck(self.backbone.channels, head_width)
        per_location = len(anchor_scales) * len(anchor_ratios) if anchor_shapes is None else len(anchor_shapes[0])
        self.head = Head(head_width, head_depth, per_location, num_classes)
        self.to(memory_format=torch.channels_last)

    @classmethod
    def from_config(cls, model_cfg: dict[str, Any], num_classes: int, image_size: int,
                    precision: str = "float32") -> Detector:
        """Build from ``config['model']`` (training forward at ``precision``: ``config['train']['precision']``);
        loads ``model_cfg['weights']`` when it names a local file."""
        keys = ("width", "head_width", "head_depth", "strides", "anchor_sizes", "anchor_scales", "anchor_ratios")
        missing = [k for k in keys if k not in model_cfg]
        if missing:
            raise ValueError(f"config 'model' section lacks key(s) {missing}")
        shapes = model_cfg.get("anchor_shapes")
        model = cls(num_classes, image_size, **{k: model_cfg[k] for k in keys},
                    anchor_shapes=shapes if isinstance(shapes, list) else None, precision=precision)
        if model_cfg.get("weights"):
            model.load_weights(model_cfg["weights"])
        return model

    def __repr__(self) -> str:
        return (f"Detector(num_classes={self.num_classes}, image_size={self.image_size}, "
                + ", ".join(f"{k}={v}" for k, v in self.settings.items()) + ")")

    def forward(self, images: torch.Tensor) -> dict[str, Any]:
        if images.dim() != 4 or images.shape[1] != 3 or images.shape[-1] != self.image_size \
                or images.shape[-2] != self.image_size:
            raise ValueError(f"Detector expects images [B, 3, {self.image_size}, {self.image_size}], "
                             f"got {list(images.shape)}")
        with training_autocast(self.precision if self.training else "float32", "train.precision",
                               images.device.type):
            features = self.neck(self.backbone(images))                 # the stem normalises (x - 0.5) * 4
            cls_logits, box_deltas = self.head(features)
        return {"cls_logits": cls_logits, "box_deltas": box_deltas, "features": features}

    def load_weights(self, path: str | Path) -> tuple[list[str], list[str]]:
        """Load a local checkpoint: a whole-model or backbone ``state_dict`` (or a dict with a ``model`` entry).

        Loads with ``strict=False``; keys of the wrong shape are skipped. Logs and returns
        ``(missing, unexpected)`` key lists. Nothing is downloaded.
        """
        path = Path(path)
        try:
            state = torch.load(path, map_location="cpu", weights_only=True)
        except (OSError, RuntimeError, ValueError, EOFError, pickle.UnpicklingError) as exc:
            raise ValueError(f"{path}: cannot read model weights: {exc}") from exc
        if isinstance(state, dict) and isinstance(state.get("model"), dict):
            state = state["model"]
        if not isinstance(state, dict) or not all(isinstance(v, torch.Tensor) for v in state.values()):
            raise ValueError(f"{path}: expected a state_dict (name -> tensor), got {type(state).__name__}")
        own = self.state_dict()
        if not any(k in own for k in state) and any(f"backbone.{k}" in own for k in state):
            state = {f"backbone.{k}": v for k, v in state.items()}
        wrong_shape = [k for k, v in state.items() if k in own and own[k].shape != v.shape]
        usable = {k: v for k, v in state.items() if k not in wrong_shape}
        if not any(k in own for k in usable):
            raise ValueError(f"{path}: no parameter name matches this detector (first keys: {list(state)[:5]})")
        result = self.load_state_dict(usable, strict=False)
        unexpected = list(result.unexpected_keys) + wrong_shape
        if result.missing_keys or unexpected:
            log.warning("%s: loaded with %d missing key(s) %s and %d unexpected or mis-shaped key(s) %s",
                        path, len(result.missing_keys), result.missing_keys[:20], len(unexpected), unexpected[:20])
        return list(result.missing_keys), unexpected
