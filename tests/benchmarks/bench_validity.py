"""Audit validity on generated scenarios with planted faults, default settings, beside baselines of the same run.

For each scenario and seed: generate it, run ``detdiff audit`` with the default config (the recipe fits itself to
the data; only ``--flips`` is passed, the one setting a user must choose from the view's symmetry), then score
the run folder against the scenario's ``truth.json``. Printed per run and fault kind: the AUROC of the ranking
behind each suspect list (cross-fitted evidence), of the in-sample loss stream (``pos_score`` / ``loc_score`` /
image ``neg_score``) and of baselines (last epoch, box count, class rarity, random); precision@k (k = planted);
the list's length against the planted count and its true precision; and the audit's own self-measured figures
beside them. Goals (issue #13): wrong-class AUROC >= 0.95, loose box >= 0.90, missing box (image) >= 0.85;
precision@k wrong class >= 0.8, missing box >= 0.6; AP50 >= 0.7; each list <= 2x the planted count;
self-measured figures within 0.05 of the truth; an 800-image audit within 10 minutes. Also printed per run: the
plan's projected seconds beside the measured ones (``run.json["plan_seconds"]``, :mod:`detdiff.plan`) and their
ratio, against the goal measured / projected within 0.75-1.25 (stored in ``validity.json`` as ``plan_ratio``).

    .venv/bin/python tests/benchmarks/bench_validity.py [--scenarios warehouse aerial digits streetcam] [--seeds 1 2]
        [--num-images 800] [--out DIR] [--set section.key=value ...]
"""

from __future__ import annotations

import argparse
import json
import tempfile
import time
from pathlib import Path

import yaml

from detdiff.analysis.validity import score_against_truth
from detdiff.data.scenarios import SCENARIO_FLIPS, generate_demo
from detdiff.pipeline import run_audit
from detdiff.report.run_folder import epochs_cut

GOALS = {("wrong_class", "auroc_evidence"): 0.95, ("loose_box", "auroc_evidence"): 0.90,
         ("missing_box", "auroc_evidence"): 0.85, ("wrong_class", "precision_at_k"): 0.8,
         ("missing_box", "precision_at_k"): 0.6}
#: Goal of the plan's wall-time projection: measured / projected within these bounds.
PLAN_RATIO = (0.75, 1.25)
COLUMNS = [("planted", "planted", "{}"), ("evidence", "auroc_evidence", "{:.3f}"), ("stream", "auroc", "{:.3f}"),
           ("last ep", "auroc_last_epoch", "{:.3f}"), ("boxes", "auroc_box_count", "{:.3f}"),
           ("rarity", "auroc_rarity", "{:.3f}"), ("random", "auroc_random", "{:.3f}"),
           ("P@k", "precision_at_k", "{:.3f}"), ("P@k uncut", "precision_at_k_ranking", "{:.3f}"),
           ("listed", "suspects", "{}"),
           ("list/planted", "list_to_planted", "{:.2f}"), ("list prec", "list_precision", "{:.3f}"),
           ("self AUROC", "self_auroc", "{:.3f}"), ("self prec", "self_expected_precision", "{:.3f}")]


def _cell(value, fmt: str, width: int) -> str:
    """One right-aligned table cell; '-' where the value is missing or NaN."""
    text = "-" if value is None or (isinstance(value, float) and value != value) else fmt.format(value)
    return f"{text:>{width}}"


def run_one(scenario: str, seed: int, num_images: int, out: Path, overrides: dict) -> dict:
    """Generate, audit and score one scenario at one seed; returns the figures."""
    t0 = time.perf_counter()
    demo = generate_demo(out / f"{scenario}_{seed}" / "data", scenario=scenario, num_images=num_images, seed=seed,
                         progress=False)
    t1 = time.perf_counter()
    settings = {"train": {"seed": seed, "flips": SCENARIO_FLIPS.get(scenario, "horizontal")}}
    for section, values in overrides.items():
        settings.setdefault(section, {}).update(values)
    rundir = out / f"{scenario}_{seed}" / "run"
    run_audit(demo.annotations, demo.images_dir, rundir, overrides=settings, progress=False, make_report=False)
    t2 = time.perf_counter()
    scores = score_against_truth(rundir, demo.truth, seed=seed)
    metrics = json.loads((rundir / "metrics.json").read_text())
    run_info = json.loads((rundir / "run.json").read_text())
    plan = run_info.get("plan_seconds") or {}
    return {"scenario": scenario, "seed": seed, "images": num_images, "generate_s": t1 - t0, "audit_s": t2 - t1,
            "AP50": metrics.get("AP50"), "AP50_small": metrics.get("AP50_small"), "timings": run_info.get("timings"),
            "plan_seconds": plan, "plan_ratio": plan.get("ratio"), "epochs_done": run_info.get("epochs_done"),
            "epochs_planned": run_info.get("epochs_planned"),
            "recipe": json.loads((rundir / "recipe.json").read_text()).get("settings"), "scores": scores}


def print_run(result: dict) -> None:
    recipe = result["recipe"] or {}
    small = result["AP50_small"]
    print(f"\n== {result['scenario']} seed {result['seed']}: {result['images']} images, audit {result['audit_s'] / 60:.1f} min,"
          f" detector AP50 {result['AP50']:.3f} (small {'-' if small is None else f'{small:.3f}'}); view {recipe.get('data.image_size')},"
          f" epochs {_epochs(result, recipe)}, crop epochs {recipe.get('crossfit.epochs')}")
    widths = [max(len(name) + 1, 7) for name, _, _ in COLUMNS]
    print(f"{'kind':<13}" + "".join(f"{name:>{w}}" for (name, _, _), w in zip(COLUMNS, widths)))
    for kind in ("wrong_class", "loose_box", "missing_box", "duplicate_box"):
        s = result["scores"][kind]
        print(f"{kind:<13}" + "".join(_cell(s.get(key), fmt, w) for (_, key, fmt), w in zip(COLUMNS, widths)))
    for (kind, key), goal in GOALS.items():
        value = result["scores"][kind].get(key)
        verdict = "met" if value is not None and value == value and value >= goal else "NOT met"
        print(f"  goal {kind} {key} >= {goal}: {verdict} ({value if value is None else round(value, 3)})")
    print_plan(result.get("plan_seconds") or {})


def _epochs(result: dict, recipe: dict) -> str:
    """The detector's epochs: done, and planned where the time limit (train.time_limit) ended training early."""
    cut = epochs_cut(result)
    return f"{cut[0]} of {cut[1]} (time limit)" if cut else f"{recipe.get('train.epochs')}"


def print_plan(plan: dict) -> None:
    """The plan's projected seconds beside the measured ones, per stage, and the goal on their ratio."""
    if not plan.get("parts"):
        print("  plan: none in run.json")
        return
    parts = "  ".join(f"{name} {p:.1f}/{m:.1f}" for name, (p, m) in plan["parts"].items())
    ratio, (low, high) = plan["ratio"], PLAN_RATIO
    verdict = "met" if ratio is not None and low <= ratio <= high else "NOT met"
    print(f"  plan (projected/measured s): {parts}; total {plan['projected']:.1f}/{plan['measured']:.1f}")
    print(f"  goal plan measured/projected in {low}-{high}: {verdict} ({ratio})")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--scenarios", nargs="+", default=["warehouse", "aerial", "digits", "streetcam"])
    parser.add_argument("--seeds", nargs="+", type=int, default=[1, 2])
    parser.add_argument("--num-images", type=int, default=800)
    parser.add_argument("--out", type=Path, default=None)
    parser.add_argument("--set", action="append", default=[], metavar="SECTION.KEY=VALUE",
                        help="config override, value read as YAML (repeatable)")
    args = parser.parse_args()
    overrides: dict[str, dict] = {}
    for item in args.set:
        dotted, _, value = item.partition("=")
        section, _, key = dotted.partition(".")
        overrides.setdefault(section, {})[key] = yaml.safe_load(value)
    out = args.out or Path(tempfile.mkdtemp(prefix="detdiff-validity-"))
    results = []
    for scenario in args.scenarios:
        for seed in args.seeds:
            results.append(run_one(scenario, seed, args.num_images, out, overrides))
            print_run(results[-1])
            (out / "validity.json").write_text(json.dumps(results, indent=1, default=float))
    print(f"\ndetails: {out / 'validity.json'}")


if __name__ == "__main__":
    main()
