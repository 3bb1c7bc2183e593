"""The detector of detdiff.model: outputs and anchors line up, weights load locally, post-processing and pooling
agree with torchvision's ops, and the model learns simple objects."""

from __future__ import annotations

import logging

import pytest
import torch
from torchvision.ops import box_iou, roi_align

from detdiff.config import load_config
from detdiff.model.anchors import anchor_shapes, make_anchors
from detdiff.model.box_coder import BoxCoder, xyxy_to_cxcywh
from detdiff.model.detector import Detector, NormalisedPatchify
from detdiff.model.losses import compute_loss_streams
from detdiff.model.postprocess import feature_level, pooled_object_features, postprocess_detections

CI = load_config("ci")


def ci_model(num_classes: int = 3) -> Detector:
    torch.manual_seed(0)
    return Detector.from_config(CI["model"], num_classes, CI["data"]["image_size"])


@pytest.mark.parametrize("name", ["ci", None])
def test_output_shapes_follow_the_config(name: str | None) -> None:
    cfg = load_config(name)
    size = cfg["data"]["image_size"]
    if size == "auto":                 # the default view is fitted to a dataset (detdiff.recipe); any multiple of 32
        size = 256
    model = Detector.from_config(cfg["model"], 4, size)
    m = cfg["model"]
    per_location = len(m["anchor_scales"]) * len(m["anchor_ratios"])
    expected_n = sum((size // s) ** 2 for s in m["strides"]) * per_location
    with torch.no_grad():
        out = model(torch.rand(2, 3, size, size))
    assert model.anchors.shape == (expected_n, 4)
    assert out["cls_logits"].shape == (2, expected_n, 4)
    assert out["box_deltas"].shape == (2, expected_n, 4)
    expected_levels = [(2, m["head_width"], size // s, size // s) for s in m["strides"]]
    assert [tuple(f.shape) for f in out["features"]] == expected_levels
    assert torch.isfinite(out["cls_logits"]).all()


def test_head_outputs_line_up_with_anchor_order() -> None:
    # replace the predictor's output by one that writes each cell's centre, anchor slot and level stride
    # into the box channels; decoding order must then reproduce the anchors' own centres and shapes
    model = ci_model(num_classes=2)
    size, strides = model.image_size, model.strides
    slots = model.head.num_anchors
    channels = 2 + 4

    def fake_predictor(module: torch.nn.Module, inputs: tuple, output: torch.Tensor) -> torch.Tensor:
        b, _, h, w = output.shape
        stride = size // h
        ys, xs = torch.meshgrid(torch.arange(h), torch.arange(w), indexing="ij")
        fake = torch.zeros(b, slots, channels, h, w)
        fake[:, :, 2] = ((xs + 0.5) * stride).float()
        fake[:, :, 3] = ((ys + 0.5) * stride).float()
        fake[:, :, 4] = torch.arange(slots).float()[:, None, None]
        fake[:, :, 5] = float(stride)
        return fake.reshape(b, slots * channels, h, w)

    model.head.predictor.register_forward_hook(fake_predictor)
    with torch.no_grad():
        deltas = model(torch.rand(1, 3, size, size))["box_deltas"][0]
    centres = xyxy_to_cxcywh(model.anchors)
    torch.testing.assert_close(deltas[:, :2], centres[:, :2])
    shapes_by_level = {s: anchor_shapes([a * k for k in CI["model"]["anchor_scales"]], CI["model"]["anchor_ratios"])
                       for s, a in zip(strides, CI["model"]["anchor_sizes"])}
    expected_wh = torch.stack([shapes_by_level[int(s)][int(k)] for k, s in deltas[:, 2:].tolist()])
    torch.testing.assert_close(centres[:, 2:], expected_wh)


def test_stem_equals_conv_of_normalised_images() -> None:
    # reference: torch.nn.functional.conv2d on (x - 0.5) * 4, values and weight gradients
    torch.manual_seed(2)
    stem = NormalisedPatchify(8, 4)
    images = torch.rand(2, 3, 32, 32)
    ours = stem(images)
    reference = torch.nn.functional.conv2d((images - 0.5) * 4, stem.weight, stem.bias, stride=4)
    torch.testing.assert_close(ours, reference, rtol=1e-5, atol=1e-5)
    grad_ours = torch.autograd.grad(ours.square().sum(), stem.weight)[0]
    grad_ref = torch.autograd.grad(reference.square().sum(), stem.weight)[0]
    torch.testing.assert_close(grad_ours, grad_ref, rtol=1e-4, atol=1e-4)


def test_two_levels_with_a_gap() -> None:
    cfg = {**CI["model"], "strides": [8, 32], "anchor_sizes": [16, 64]}
    model = Detector.from_config(cfg, 2, 128)
    with torch.no_grad():
        out = model(torch.rand(1, 3, 128, 128))
    assert [f.shape[-1] for f in out["features"]] == [16, 4]
    assert out["cls_logits"].shape[1] == model.anchors.shape[0] == (16 ** 2 + 4 ** 2) * 3


def test_wrong_input_size_is_refused() -> None:
    with pytest.raises(ValueError, match="expects images"):
        ci_model()(torch.rand(1, 3, 64, 64))
    with pytest.raises(ValueError, match="multiple"):
        Detector.from_config(CI["model"], 3, 100)


def test_load_weights_whole_model_backbone_and_mismatch(tmp_path, caplog) -> None:
    source = ci_model(num_classes=3)
    torch.save(source.state_dict(), tmp_path / "whole.pt")
    torch.save({"model": source.state_dict(), "epoch": 3}, tmp_path / "checkpoint.pt")
    torch.save(source.backbone.state_dict(), tmp_path / "backbone.pt")
    for name in ("whole.pt", "checkpoint.pt"):
        target = Detector.from_config(CI["model"], 3, 128)
        assert target.load_weights(tmp_path / name) == ([], [])
        for (k, a), b in zip(source.state_dict().items(), target.state_dict().values()):
            assert torch.equal(a, b), k
    target = Detector.from_config(CI["model"], 3, 128)
    missing, unexpected = target.load_weights(tmp_path / "backbone.pt")
    assert unexpected == [] and missing and all(not k.startswith("backbone.") for k in missing)
    assert torch.equal(target.backbone.stem[0].weight, source.backbone.stem[0].weight)
    other_classes = Detector.from_config({**CI["model"], "weights": str(tmp_path / "whole.pt")}, 5, 128)
    with caplog.at_level(logging.WARNING):
        missing, unexpected = other_classes.load_weights(tmp_path / "whole.pt")
    assert unexpected == ["head.predictor.weight", "head.predictor.bias"]
    assert "head.predictor.weight" in caplog.text
    (tmp_path / "junk.pt").write_bytes(b"not a checkpoint")
    with pytest.raises(ValueError, match="junk.pt"):
        target.load_weights(tmp_path / "junk.pt")


def test_postprocess_returns_the_confident_box_and_applies_nms() -> None:
    anchors = make_anchors(64, (8, 16), (16, 32), (1.0,), (0.5, 1.0, 2.0))
    g = torch.Generator().manual_seed(0)
    logits = torch.randn(2, len(anchors), 3, generator=g) - 1.0
    deltas = torch.randn(2, len(anchors), 4, generator=g) * 0.3
    logits[1, 17, 2] = 8.0
    outputs = {"cls_logits": logits, "box_deltas": deltas}
    dets = postprocess_detections(outputs, anchors, score_threshold=0.05, max_detections=20, nms_iou=0.5)
    assert len(dets) == 2
    top = dets[1]
    torch.testing.assert_close(top["boxes"][0], BoxCoder().decode(deltas[1, 17], anchors[17]))
    assert top["labels"][0].item() == 2
    assert top["scores"][0].item() == pytest.approx(torch.sigmoid(torch.tensor(8.0)).item())
    for det in dets:
        assert len(det["scores"]) <= 20 and (det["scores"] >= 0.05).all()
        assert (det["scores"][:-1] >= det["scores"][1:]).all()
        for label in det["labels"].unique():
            same = det["boxes"][det["labels"] == label]
            # NMS leaves no same-class pair above the threshold (reference: torchvision.ops.box_iou)
            assert (box_iou(same, same).triu(1) <= 0.5 + 1e-6).all()


def test_pooled_features_equal_roi_align_on_the_chosen_level() -> None:
    # reference: torchvision.ops.roi_align on the level feature_level picks, 2x2 bins averaged
    g = torch.Generator().manual_seed(1)
    feats = [torch.randn(2, 5, 128 // s, 128 // s, generator=g) for s in (8, 16, 32)]
    boxes = torch.tensor([[10.0, 10, 20, 22], [0, 0, 90, 80], [0, 0, 128, 128], [5, 40, 45, 80]])
    batch_index = torch.tensor([0, 1, 1, 0])
    levels = feature_level(boxes, (8, 16, 32))
    assert levels.tolist() == [0, 1, 2, 0]
    pooled = pooled_object_features(feats, boxes, batch_index)
    assert pooled.shape == (4, 5)
    for k in range(4):
        s = (8, 16, 32)[levels[k]]
        roi = torch.cat((batch_index[k:k + 1].float(), boxes[k]))[None]
        ref = roi_align(feats[levels[k]], roi, 2, spatial_scale=1 / s, sampling_ratio=2, aligned=True).mean((2, 3))
        torch.testing.assert_close(pooled[k], ref[0])
    assert pooled_object_features(feats, torch.zeros(0, 4), torch.zeros(0, dtype=torch.int64)).shape == (0, 5)


def squares_batch(count: int, seed: int) -> tuple[torch.Tensor, list[dict[str, torch.Tensor]]]:
    """Grey 128 px images with a bright square (class 0) and a dark wide bar (class 1), 10-40 px."""
    g = torch.Generator().manual_seed(seed)
    images = torch.full((count, 3, 128, 128), 0.45)
    targets = []
    for b in range(count):
        side = int(torch.randint(10, 40, (1,), generator=g))
        x0, y0 = (int(v) for v in torch.randint(0, 128 - 40, (2,), generator=g))
        x1, y1 = int(torch.randint(0, 60, (1,), generator=g)), int(torch.randint(90, 118, (1,), generator=g))
        images[b, :, y0:y0 + side, x0:x0 + side] = 0.95
        images[b, :, y1:y1 + 10, x1:x1 + 2 * side] = 0.05
        boxes = torch.tensor([[x0, y0, x0 + side, y0 + side], [x1, y1, x1 + 2 * side, y1 + 10]], dtype=torch.float32)
        targets.append({"boxes": boxes, "labels": torch.tensor([0, 1])})
    return images, targets


@pytest.fixture
def one_thread():
    """One intra-op thread: on shared cores two threads wait on each other far more than they gain."""
    before = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(before)


@pytest.mark.slow
def test_detector_learns_simple_objects(one_thread) -> None:
    model = ci_model(num_classes=2)
    images, targets = squares_batch(16, seed=0)
    optimizer = torch.optim.AdamW(model.parameters(), lr=3e-3)
    first = None
    for _ in range(60):
        streams = compute_loss_streams(model(images), model.anchors, targets, CI["loss"], CI["log"])
        optimizer.zero_grad()
        streams.total.backward()
        optimizer.step()
        first = first if first is not None else streams.total.item()
    assert streams.total.item() < 0.3 * first
    model.eval()
    with torch.no_grad():
        obj = compute_loss_streams(model(images), model.anchors, targets, CI["loss"], CI["log"]).objects
    assert obj["pred_iou"].median() > 0.6
    assert obj["detected"].float().mean() > 0.7


def test_bfloat16_training_pass_keeps_float32_outputs_and_eval_stays_float32() -> None:
    # torch.autocast reference: bfloat16 has 8 significant bits (torch.finfo(torch.bfloat16).eps = 2**-7); through
    # the backbone, neck and head tower the logits stay within a few such steps of the float32 pass, and the
    # predictor's outputs are float32 (the loss streams are computed from them).
    torch.manual_seed(0)
    exact = Detector(3, 64, width=8, head_width=16)
    rounded = Detector(3, 64, width=8, head_width=16, precision="bfloat16")
    rounded.load_state_dict(exact.state_dict())
    images = torch.rand(2, 3, 64, 64).contiguous(memory_format=torch.channels_last)
    want = exact.train()(images)["cls_logits"]
    got = rounded.train()(images)["cls_logits"]
    assert got.dtype == torch.float32
    assert (got - want).abs().max() <= 16 * torch.finfo(torch.bfloat16).eps * want.abs().max()
    assert not torch.equal(got, want)
    with torch.no_grad():
        torch.testing.assert_close(rounded.eval()(images)["cls_logits"], exact.eval()(images)["cls_logits"])
    with pytest.raises(ValueError, match="train.precision"):
        Detector(3, 64, precision="half")
