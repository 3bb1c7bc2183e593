"""Faults in every stage of a small audit, each from a fresh run: SIGKILL or a full disk, then ``--resume``.

For every stage of detdiff.stages and every moment, one run is faulted and resumed, and its outputs are
compared with an uninterrupted run (tests/fault_injection.py says which files and how). Cases:

- ``kill``: SIGKILL at a fraction of the stage's traced duration (``DETDIFF_FAULT=<stage>:kill:<s>``);
- ``enospc``: the disk fills at a fraction of the files the stage opens for writing (``<stage>:enospc:<k>``:
  from then on every write in the run folder meets a real ENOSPC from /dev/full);
- ``tmpfs`` (with ``--real-disk``; on by default where ``unshare -Urm`` works, i.e. unprivileged user and
  mount namespaces): the run folder lives on a 64 MB tmpfs, and as the stage opens its k-th file another
  "job" fills that file system but 16 KiB (``<stage>:fill:<k>``): the kernel's own ENOSPC at whatever write
  comes next, mid-file included. The run folder is then copied to the ordinary disk (what freeing space
  amounts to) and resumed there. Where an up-front room check refuses (decode and train check their room
  as they start), that one line is what is expected; the stage named in the line is the one counted.

Printed per stage and case: runs, tracebacks, runs that did not end as expected (SIGKILL; exit 2 with one
disk-full line), runs whose resume did not finish, table rows lost or changed, files differing, most bytes
over the uninterrupted run, leftovers reclaimed; then totals and the seconds. Moments: fractions 0.1, 0.5 and
0.9 plus ``--random`` more drawn from ``numpy.random.default_rng(SEED)``; dataset: warehouse demo of
``--num-images`` images, seed 5, config ci.

Run: ``.venv/bin/python tests/benchmarks/bench_faults.py [--num-images 24] [--random 1] [--stages train,report]
[--cases kill,enospc,tmpfs]``
"""

from __future__ import annotations

import argparse
import re
import shutil
import subprocess
import sys
import tempfile
import time
from collections import defaultdict
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from fault_injection import (STAGES, Audit, Launch, check_launch, compare_runs, fault_spec,  # noqa: E402
                             table_rows_changed)

from detdiff.data.scenarios import generate_demo  # noqa: E402
from detdiff.stages import STAGE_WORDS  # noqa: E402

SEED = 18
FRACTIONS = (0.1, 0.5, 0.9)
TMPFS_BYTES = 64 * 2**20
_RECLAIMED = re.compile(r"removed (\d+) temporary files? .* \(([\d.]+) (kB|MB|GB) reclaimed\)")
_UNIT_MB = {"kB": 1e-3, "MB": 1.0, "GB": 1e3}


def real_disk_available() -> bool:
    """Whether an unprivileged user + mount namespace can mount a tmpfs here."""
    try:
        return subprocess.run(["unshare", "-Urm", "sh", "-c", "mount -t tmpfs -o size=1m tmpfs /mnt"],
                              capture_output=True, timeout=30, check=False).returncode == 0
    except (OSError, subprocess.TimeoutExpired):
        return False


def launch_on_tmpfs(audit: Audit, fault: str, mount: Path, dest: Path, size: int = TMPFS_BYTES) -> Launch:
    """The audit with ``DETDIFF_FAULT=fault`` and its run folder on a tmpfs of ``size`` bytes; the run folder is
    copied to ``dest`` after."""
    mount.mkdir(parents=True, exist_ok=True)
    args = [str(audit.annotations), "--images", str(audit.images), *audit.extra]
    script = ('mount -t tmpfs -o size="$1" tmpfs "$2" || exit 97; shift 3; "$0" -m detdiff audit --out "$M/run" "$@";'
              ' rc=$?; cp -a "$M/run" "$D"; exit $rc')
    env_prefix = ["env", f"M={mount}", f"D={dest}"]
    start = time.perf_counter()
    proc = subprocess.run(["unshare", "-Urm", *env_prefix, "sh", "-c", script, sys.executable, str(size),
                           str(mount), "unused", *args], capture_output=True, text=True, check=False,
                          env=audit.child_env(fault))
    return Launch(fault, proc.returncode, proc.stdout, proc.stderr, time.perf_counter() - start)


def failed_stage(launch: Launch) -> str | None:
    """The stage named by a disk-full line (by its words), or ``"up-front"`` for a room check's refusal."""
    last = (launch.stderr.strip().splitlines() or [""])[-1]
    for name, words in STAGE_WORDS.items():
        if re.search(rf"cannot write {re.escape(words)}(?: \(|\.)", last):
            return name
    return "up-front" if "needs about" in last and "free" in last else None


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--num-images", type=int, default=24)
    parser.add_argument("--random", type=int, default=0, help="random moments per stage and case, beyond 0.1/0.5/0.9")
    parser.add_argument("--stages", default=",".join(STAGES))
    parser.add_argument("--real-disk", choices=["auto", "yes", "no"], default="auto")
    parser.add_argument("--cases", default="kill,enospc,tmpfs", help="which of kill, enospc, tmpfs to run")
    args = parser.parse_args()
    stages = args.stages.split(",")
    rng = np.random.default_rng(SEED)
    real_disk = args.real_disk == "yes" or (args.real_disk == "auto" and real_disk_available())
    cases = [c for c in args.cases.split(",") if c != "tmpfs" or real_disk]
    start = time.perf_counter()
    with tempfile.TemporaryDirectory(prefix="bench_faults_") as tmp:
        root = Path(tmp)
        paths = generate_demo(root / "demo", num_images=args.num_images, seed=5, width=128, height=96,
                              progress=False)
        audit = Audit(paths.annotations, paths.images_dir)
        reference_launch, stats = audit.trace(root / "reference")
        assert reference_launch.returncode == 0, reference_launch.stderr
        print(f"uninterrupted run: {reference_launch.seconds:.1f} s; stages traced (s, write-opens, disk growth):")
        for name in stages:
            s = stats[name]
            print(f"  {name:<9} {s['seconds']:7.2f} s {s['write_opens']:4d} opens "
                  f"{(s['disk_end'] - s['disk_start']) / 1e6:+8.2f} MB")
        rows: dict[tuple[str, str], dict[str, float]] = defaultdict(lambda: defaultdict(float))
        failures: list[str] = []
        number = 0
        for name in stages:
            fractions = list(FRACTIONS) + [float(u) for u in rng.uniform(size=args.random)]
            for kind in cases:
                for fraction in fractions:
                    number += 1
                    run = root / f"run{number}"
                    if kind == "tmpfs":
                        fault = fault_spec(name, "enospc", fraction, stats[name]).replace(":enospc:", ":fill:")
                        launch = launch_on_tmpfs(audit, fault, root / f"mnt{number}", run)
                        problems = check_launch(launch, "enospc") if failed_stage(launch) != "up-front" else (
                            [f"{launch.tracebacks} traceback(s)"] if launch.tracebacks else [])
                        if launch.returncode == 0:
                            problems = ["the disk did not fill"]
                        where = failed_stage(launch) or "?"
                    else:
                        launch = audit.launch(run, fault=fault_spec(name, kind, fraction, stats[name]))
                        problems, where = check_launch(launch, kind), name
                    resumed = audit.launch(run, resume=True)
                    row = rows[(name, kind)]
                    row["runs"] += 1
                    row["tracebacks"] += launch.tracebacks + resumed.tracebacks
                    row["bad endings"] += bool(problems)
                    row["unfinished"] += resumed.returncode != 0
                    reclaimed = _RECLAIMED.search(resumed.stderr)
                    if reclaimed:
                        row["leftovers"] += int(reclaimed.group(1))
                        row["MB reclaimed"] += float(reclaimed.group(2)) * _UNIT_MB[reclaimed.group(3)]
                    if resumed.returncode == 0:
                        comparison = compare_runs(run, root / "reference")
                        row["rows changed"] += table_rows_changed(run, root / "reference")
                        row["files differing"] += len(comparison.changed + comparison.extra + comparison.missing)
                        row["max extra bytes"] = max(row["max extra bytes"], comparison.extra_bytes)
                        if not comparison.ok:
                            failures.append(f"{launch.fault} (stage {where}): {comparison}")
                    if problems or resumed.returncode != 0 or resumed.tracebacks:
                        failures.append(f"{launch.fault} (stage {where}): {problems} resume exit "
                                        f"{resumed.returncode} {resumed.stderr[-400:]!r}")
                    if kind == "tmpfs":
                        row[f"failed in {where}"] += 1
                    shutil.rmtree(run, ignore_errors=True)
                    print(f"  {launch.fault:<28} {launch.returncode:4d} {launch.seconds:5.1f} s, resumed "
                          f"{resumed.returncode} {resumed.seconds:5.1f} s {'; '.join(problems)}", flush=True)

    columns = ["runs", "tracebacks", "bad endings", "unfinished", "rows changed", "files differing",
               "max extra bytes", "leftovers", "MB reclaimed"]
    print(f"\n{'stage':<9} {'case':<7} " + " ".join(f"{c:>15}" for c in columns))
    totals: dict[str, float] = defaultdict(float)
    for (name, kind), row in rows.items():
        print(f"{name:<9} {kind:<7} " + " ".join(f"{row[c]:>15g}" for c in columns)
              + "".join(f"  {k}: {int(v)}" for k, v in row.items() if k.startswith("failed in")))
        for c in columns:
            totals[c] = max(totals[c], row[c]) if c == "max extra bytes" else totals[c] + row[c]
    print(f"{'total':<17} " + " ".join(f"{totals[c]:>15g}" for c in columns))
    print(f"\n{int(totals['runs'])} faulted runs + as many resumes in {time.perf_counter() - start:.0f} s; "
          f"seed {SEED}; real disk (tmpfs) {'on' if real_disk else 'off (no unprivileged namespaces)'}")
    for line in failures:
        print("FAILED", line)
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
