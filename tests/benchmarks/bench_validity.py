"""Audit validity on the demo with planted faults, beside baselines measured in the same run.

Prints, per fault kind, the AUROC of the matching stream (accumulated loss) against: the last epoch's
loss alone, the image's box count, and random scores; and precision / recall at k = number planted.
Goals: wrong_class AUROC >= 0.95, loose_box >= 0.90, missing (image neg_score) >= 0.85,
wrong_class precision@k >= 0.8.

    .venv/bin/python tests/benchmarks/bench_validity.py [--num-images 300] [--config topdown] [--out DIR]
        [--set train.flips=both ...]
"""

from __future__ import annotations

import argparse
import json
import tempfile
import time
from pathlib import Path

import yaml

from detdiff.analysis.validity import score_against_truth
from detdiff.data.scenarios import generate_demo
from detdiff.pipeline import run_audit

GOALS = {"wrong_class": ("auroc", 0.95), "loose_box": ("auroc", 0.90), "missing_box": ("auroc", 0.85)}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--num-images", type=int, default=300)
    parser.add_argument("--config", default="topdown")
    parser.add_argument("--epochs", type=int, default=None)
    parser.add_argument("--out", type=Path, default=None)
    parser.add_argument("--seed", type=int, default=0, help="seed of the demo scenario and of training")
    parser.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                        help="config override, value read as YAML (repeatable)")
    args = parser.parse_args()
    overrides: dict[str, dict] = {"train": {"epochs": args.epochs, "seed": args.seed}}
    for item in args.set:
        dotted, _, value = item.partition("=")
        section, _, key = dotted.partition(".")
        overrides.setdefault(section, {})[key] = yaml.safe_load(value)
    out = args.out or Path(tempfile.mkdtemp(prefix="detdiff-validity-"))
    t0 = time.perf_counter()
    demo = generate_demo(out / "demo", num_images=args.num_images, seed=args.seed, progress=False)
    t1 = time.perf_counter()
    run_audit(demo.annotations, demo.images_dir, out / "run", config_path=args.config,
              overrides=overrides, progress=False, make_report=False)
    t2 = time.perf_counter()
    scores = score_against_truth(out / "run", demo.truth)
    metrics = json.loads((out / "run" / "metrics.json").read_text())
    print(f"demo: {args.num_images} images in {t1 - t0:.1f} s; audit ({args.config}) in {t2 - t1:.1f} s; "
          f"detector AP50 {metrics['AP50']:.3f}")
    print(f"{'kind':<14}{'planted':>8}{'stream':>11}{'AUROC':>8}{'last ep':>9}{'boxes':>8}{'random':>8}"
          f"{'P@k':>7}{'R@k':>7}")
    for kind, s in scores.items():
        fmt = lambda key: f"{s[key]:.3f}" if key in s and s[key] == s[key] else "  -  "
        print(f"{kind:<14}{s['planted']:>8}{s.get('stream', '-'):>11}{fmt('auroc'):>8}{fmt('auroc_last_epoch'):>9}"
              f"{fmt('auroc_box_count'):>8}{fmt('auroc_random'):>8}{fmt('precision_at_k'):>7}{fmt('recall_at_k'):>7}")
    if "auroc_other_class_lead" in scores["wrong_class"]:
        print(f"wrong_class AUROC of other_class_lead (the suspects' ranking, all objects): "
              f"{scores['wrong_class']['auroc_other_class_lead']:.3f}")
    if "auroc_box_disagreement" in scores["loose_box"]:
        print(f"loose_box AUROC of box_disagreement (late-epoch 1 - IoU with the detector's box, all objects): "
              f"{scores['loose_box']['auroc_box_disagreement']:.3f}")
    if "suggestion_accuracy" in scores["wrong_class"]:
        print(f"wrong_class suggested category correct: {scores['wrong_class']['suggestion_accuracy']:.3f}")
    for kind, (key, goal) in GOALS.items():
        print(f"goal {kind} {key} >= {goal}: {'met' if scores[kind][key] >= goal else 'NOT met'}")
    goal_p = scores["wrong_class"]["precision_at_k"]
    print(f"goal wrong_class precision@k >= 0.8: {'met' if goal_p >= 0.8 else 'NOT met'}")
    (out / "validity.json").write_text(json.dumps(scores, indent=2))
    print(f"details: {out / 'validity.json'}")


if __name__ == "__main__":
    main()
