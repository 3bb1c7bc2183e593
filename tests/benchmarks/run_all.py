"""``make bench``: every benchmark script in turn, each printing ratios measured side by side in one run."""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
ORDER = ["bench_lint_scale.py", "bench_detector.py", "bench_memory.py", "bench_analysis_scale.py",
         "bench_scale.py", "bench_validity.py"]


def main() -> int:
    failed = []
    for name in ORDER + sorted(p.name for p in HERE.glob("bench_*.py") if p.name not in ORDER):
        print(f"\n=== {name}", flush=True)
        if subprocess.run([sys.executable, str(HERE / name)], check=False).returncode != 0:
            failed.append(name)
    if failed:
        print(f"\nfailed: {', '.join(failed)}")
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())
