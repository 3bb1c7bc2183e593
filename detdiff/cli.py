"""Command line: argument parsing only; each subcommand calls one function of the package.

``main(argv) -> int`` is importable and testable. Expected failures (bad input, unusable folders,
a diverging run, a full disk at any stage) become one line on stderr and exit status 2, never a traceback.
"""

from __future__ import annotations

import argparse
import shlex
import sys
from pathlib import Path

from detdiff import __version__
from detdiff.config import FLIP_CHOICES, packaged_configs


def _expected_errors() -> tuple[type[BaseException], ...]:
    from detdiff.config import ConfigError
    from detdiff.data.coco import CocoFormatError, UnsafeImagePath
    from detdiff.pipeline import RunFolderError

    errors: list[type[BaseException]] = [ConfigError, CocoFormatError, UnsafeImagePath, RunFolderError,
                                         FileNotFoundError, PermissionError, NotADirectoryError]
    try:
        from detdiff.stages import InsufficientSpaceError
        from detdiff.train.loop import TrainingDiverged

        errors += [TrainingDiverged, InsufficientSpaceError]
    except ImportError:
        pass
    return tuple(errors)


def _cmd_check(args: argparse.Namespace) -> int:
    from detdiff.data.lint import run_check

    return run_check(args.annotations, args.images, as_json=args.json, verify_images=args.verify_images)


def _cmd_demo(args: argparse.Namespace) -> int:
    from detdiff.data.scenarios import generate_demo

    paths = generate_demo(args.out, scenario=args.scenario, num_images=args.num_images, seed=args.seed,
                          progress=not args.quiet)
    print(f"demo dataset written:\n  annotations  {paths.annotations}\n  images       {paths.images_dir}\n"
          f"  truth        {paths.truth}   (planted faults, for scoring the audit)\n"
          f"next: detdiff audit {paths.annotations} --images {paths.images_dir} --out runs/demo")
    return 0


def _overrides(args: argparse.Namespace) -> dict:
    from detdiff.pipeline import run_overrides

    return run_overrides(image_size=args.image_size, epochs=args.epochs, batch_size=args.batch_size,
                         device=args.device, seed=args.seed, threads=args.threads, flips=args.flips,
                         budget=args.budget, cache_codec=args.cache_codec)


def _cmd_audit(args: argparse.Namespace) -> int:
    from detdiff.pipeline import run_audit

    result = run_audit(args.annotations, args.images, args.out, config_path=args.config,
                       overrides=_overrides(args), resume=args.resume, progress=not args.quiet,
                       make_report=not args.no_report, top=args.top,
                       thumbnails=False if args.no_thumbnails else None, plan_only=args.plan)
    if args.plan:
        print(f"plan only: {Path(args.out) / 'plan.json'} written; nothing decoded or trained "
              f"(run again without --plan for the audit)")
    if result.summary:
        print(result.summary)
    return 0


def _cmd_analyze(args: argparse.Namespace) -> int:
    from detdiff.pipeline import analyze

    tables = analyze(args.rundir)
    print(f"{args.rundir}: {len(tables.images)} images, {len(tables.objects)} objects, "
          f"{len(tables.suspects)} suspects written")
    return 0


def _cmd_report(args: argparse.Namespace) -> int:
    from detdiff.pipeline import report

    path = report(args.rundir, top=args.top, thumbnails=False if args.no_thumbnails else None)
    print(f"report: {path}")
    return 0


def _cmd_config_list(args: argparse.Namespace) -> int:
    from detdiff.config import config_summary, packaged_configs

    names = packaged_configs()
    width = max(map(len, names))
    for name in names:
        print(f"{name:<{width}}  {config_summary(name)}")
    print("print one with 'detdiff config show NAME'; use it with '--config NAME', or save, edit and "
          "pass '--config FILE'")
    return 0


def _cmd_config_show(args: argparse.Namespace) -> int:
    from detdiff.config import packaged_config

    sys.stdout.write(packaged_config(args.name).read_text(encoding="utf-8"))
    return 0


def _add_report_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--top", type=int, default=None, help="items per list in the report (default: config)")
    p.add_argument("--no-thumbnails", action="store_true",
                   help="copy no dataset pixels into the report (for private or licensed images)")


#: ``detdiff demo --scenario`` choices; kept here so parsing imports no scenario code (see SCENARIOS).
_SCENARIO_NAMES = ("warehouse", "aerial", "digits", "streetcam")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="detdiff", description="Audit a COCO detection dataset before training: which images and boxes "
                                    "are hard, why, and which labels are probably wrong.")
    parser.add_argument("--version", action="version", version=f"detdiff {__version__}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    p = sub.add_parser("check", help="lint a COCO annotation file (no training)")
    p.add_argument("annotations", type=Path, help="COCO annotation JSON file")
    p.add_argument("--images", type=Path, default=None, help="image root folder (file_name is relative to it)")
    p.add_argument("--json", action="store_true", help="print findings as JSON")
    p.add_argument("--verify-images", action="store_true", help="also open every image (sizes, corrupt files)")
    p.set_defaults(func=_cmd_check)

    p = sub.add_parser("demo", help="generate a demo dataset with planted label faults")
    p.add_argument("--out", type=Path, required=True, help="folder for annotations.json, images/ and truth.json")
    p.add_argument("--scenario", choices=_SCENARIO_NAMES, default="warehouse",
                   help="warehouse (packing table, the default), aerial (drone over a marina and car park), "
                        "digits (real handwritten digits as house numbers on photographs) or streetcam (street "
                        "cameras at real photo sizes)")
    p.add_argument("--num-images", type=int, default=300, help="images to draw (default: 300)")
    p.add_argument("--seed", type=int, default=0, help="random seed of the scene and the planted faults (default: 0)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=_cmd_demo)

    configs = ", ".join(packaged_configs())
    p = sub.add_parser("audit", help="check, train the small detector with loss logging, analyse, report")
    p.add_argument("annotations", type=Path, help="COCO annotation JSON file")
    p.add_argument("--images", type=Path, required=True, help="image root folder (file_name is relative to it)")
    p.add_argument("--out", type=Path, required=True, help="run folder for every result")
    p.add_argument("--config", default=None,
                   help=f"YAML file, or the name of a packaged config: {configs} (without --config: default; "
                        f"'detdiff config list' says what each is for)")
    p.add_argument("--epochs", type=int, default=None, help="training epochs (default: config train.epochs)")
    p.add_argument("--image-size", type=int, default=None, help="side of the letterboxed training view, px")
    p.add_argument("--batch-size", type=int, default=None, help="images per optimizer step (default: config)")
    p.add_argument("--flips", choices=FLIP_CHOICES, default=None,
                   help="random training flips (default: config train.flips): none for text, digits or handed "
                        "classes (left/right signs); horizontal where gravity gives an up; both or dihedral (adds "
                        "the transpose) only for views with no up, down, left or right: ceiling, aerial, microscope")
    p.add_argument("--device", choices=["cpu", "cuda", "auto"], default=None,
                   help="where to train (default: config; auto = cuda when available)")
    p.add_argument("--seed", type=int, default=None, help="seed of initialisation, batch order and flips")
    p.add_argument("--threads", type=int, default=None, help="torch threads (default: all cores)")
    p.add_argument("--budget", type=float, default=None, metavar="MINUTES",
                   help="time for the whole audit to fit the recipe to, estimated on this machine before training "
                        "(default: config recipe.budget_minutes); decoding, evaluation, analysis and report are "
                        "estimated first and training gets the rest; over it, crop-model epochs, the view size, "
                        "epochs and tiles are reduced")
    p.add_argument("--cache-codec", choices=["auto", "raw", "jpeg"], default=None,
                   help="how the decoded image cache is stored (default: config data.cache_codec, auto): raw uint8 "
                        "rows, or jpeg, about a tenth of the disk, decoded again on every read")
    p.add_argument("--resume", action="store_true", help="continue after the last finished epoch")
    p.add_argument("--plan", action="store_true",
                   help="dry run: lint, fit the recipe and print the projected disk use, wall time and memory on this "
                        "machine (from a short measured warm-up) and the share of boxes too small for the view, write "
                        "plan.json, then stop before decoding or training")
    p.add_argument("--no-report", action="store_true", help="stop after the tables (write no HTML report or plots)")
    p.add_argument("--quiet", action="store_true", help="no progress bars")
    _add_report_options(p)
    p.set_defaults(func=_cmd_audit)

    p = sub.add_parser("analyze", help="recompute the tables of a run folder from its training log")
    p.add_argument("rundir", type=Path, help="run folder of an audit")
    p.set_defaults(func=_cmd_analyze)

    p = sub.add_parser("report", help="write the HTML report and plots of a run folder")
    p.add_argument("rundir", type=Path, help="run folder of an audit")
    _add_report_options(p)
    p.set_defaults(func=_cmd_report)

    p = sub.add_parser("config", help="list or print the packaged configs")
    config_sub = p.add_subparsers(dest="config_command", required=True, metavar="ACTION")
    q = config_sub.add_parser("list", help="name and purpose of each packaged config")
    q.set_defaults(func=_cmd_config_list)
    q = config_sub.add_parser("show", help="print a packaged config (save it, edit it, pass it to --config)")
    q.add_argument("name", nargs="?", default="default", choices=packaged_configs(),
                   help=f"one of {configs} (default: default, which documents every key)")
    q.set_defaults(func=_cmd_config_show)
    return parser


def _continue_command(argv: list[str]) -> str:
    """The command that goes on after a full disk: an audit with ``--resume`` added, any other command as it was."""
    resume = ["--resume"] if argv and argv[0] == "audit" and "--resume" not in argv else []
    return shlex.join(["detdiff", *argv, *resume])


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``detdiff`` command; returns the exit status."""
    from detdiff.stages import disk_full_as_one_line

    argv = sys.argv[1:] if argv is None else list(argv)
    args = build_parser().parse_args(argv)
    try:
        with disk_full_as_one_line(_continue_command(argv)):
            return int(args.func(args))
    except KeyboardInterrupt:
        print("detdiff: interrupted; finished epochs are kept (use --resume)", file=sys.stderr)
        return 130
    except _expected_errors() as exc:
        print(f"detdiff: {exc}", file=sys.stderr)
        return 2
