"""Faults at any moment lose nothing and say one clear line: full disk, kills in every stage, left-over temp files.

Real full-disk errors come from ``/dev/full`` (Linux: every write fails with ENOSPC). The audit-level test
kills or fills the disk inside every stage of one small audit in turn (``DETDIFF_FAULT``, see
detdiff/fault_hook.py), resuming after each fault, and compares the outputs with an uninterrupted run
(tests/fault_injection.py says which files and how). Fault moments: ``numpy.random.default_rng(SEED)``
uniform fractions of each stage's traced duration (kill) or write-opens (full disk); the demo dataset: 24
warehouse images of 128 x 96 px, seed 5; config ci. tests/benchmarks/bench_faults.py runs every stage x
several moments x both faults (and a real full tmpfs), each from a fresh run.
"""

from __future__ import annotations

import errno
import os
import re
import signal
import subprocess
import sys
import textwrap
import threading
import time
from pathlib import Path
from types import SimpleNamespace

import numpy as np
import pandas as pd
import pytest
import torch

from detdiff import cli, leftovers
from detdiff.atomic import allocate, write_json_atomic
from detdiff.data import image_cache
from detdiff.data.coco import build_dataset, read_coco_json
from detdiff.data.image_cache import build_image_cache
from detdiff.data.scenarios import generate_demo
from detdiff.leftovers import TEMP_NAMES, find_leftovers, remove_leftovers
from detdiff.stages import InsufficientSpaceError, disk_full_error, is_disk_full, stage
from fault_injection import STAGES, Audit, DecodeInterrupt, check_launch, compare_runs, fault_spec

SEED = 18
linux_only = pytest.mark.skipif(not Path("/dev/full").exists(), reason="needs /dev/full (Linux)")


@pytest.fixture()
def full(tmp_path):
    """A path in ``tmp_path`` whose every write fails with ENOSPC (a link to /dev/full)."""
    def make(name: str) -> Path:
        path = tmp_path / name
        path.symlink_to("/dev/full")
        return path
    return make


@linux_only
def test_every_writer_s_full_disk_error_is_recognised(full, tmp_path):
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig = plt.figure()
    writes = {
        "torch.save to a file": lambda: torch.save({"w": torch.zeros(1000)}, open(full("a.pt"), "wb")),
        "numpy savez to a file": lambda: np.savez(open(full("b.npz"), "wb"), a=np.zeros(1000)),
        "numpy open_memmap": lambda: np.lib.format.open_memmap(full("c.npy"), "w+", np.float32, (100,)),
        "memmap allocation": lambda: allocate(full("d.u8"), 10_000),
        "pandas to_csv": lambda: pd.DataFrame({"a": range(10_000)}).to_csv(full("e.csv")),
        "matplotlib savefig": lambda: fig.savefig(full("f.png"), format="png"),
        "pathlib write_bytes": lambda: full("g.jpg").write_bytes(b"x" * 100_000),
        "json, text": lambda: full("h.json").write_text("x" * 100_000),
    }
    for what, write in writes.items():
        with pytest.raises(Exception) as info:
            write()
        assert is_disk_full(info.value), what
    plt.close(fig)


def test_torch_path_write_failure_counts_as_full_only_on_a_nearly_full_disk(tmp_path, monkeypatch):
    # the message torch.save(path) raised on a full disk (issue 18), with no OSError chained
    error = RuntimeError("[enforce fail at inline_container.cc:672] . unexpected pos 64 vs 0")
    assert not is_disk_full(error, tmp_path)
    monkeypatch.setattr("shutil.disk_usage", lambda _: SimpleNamespace(free=1000))
    assert is_disk_full(error, tmp_path)


def test_full_disk_in_a_stage_is_one_line_with_folder_sizes_and_resume(tmp_path):
    with pytest.raises(RuntimeError) as info:
        with stage("train", tmp_path, "log", 12_300_000):
            raise RuntimeError("torch failed") from OSError(errno.ENOSPC, "No space left on device")
    error = disk_full_error(info.value, "detdiff audit a.json --images i --out r --resume")
    assert isinstance(error, InsufficientSpaceError) and "\n" not in str(error)
    text = str(error)
    assert text.startswith(f"{tmp_path / 'log'}: the disk is full") and "training log" in text
    assert "about 12.3 MB needed" in text and " free)" in text and text.endswith("--out r --resume")
    assert disk_full_error(ValueError("x"), "c") is None


def test_cli_turns_a_full_disk_into_one_line_and_exit_2(tmp_path, monkeypatch, capsys):
    def full_report(*args, **kwargs):
        with stage("report", tmp_path, "report"):
            raise OSError(errno.EDQUOT, "Disk quota exceeded")

    monkeypatch.setattr("detdiff.pipeline.report", full_report)
    status = cli.main(["report", str(tmp_path), "--top", "5"])
    err = capsys.readouterr().err.strip().splitlines()
    assert status == 2 and len(err) == 1
    assert "report: the disk is full" in err[0] and err[0].endswith(f"detdiff report {tmp_path} --top 5")


def _dead_pid() -> int:
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    return proc.pid


def test_leftovers_are_removed_by_name_and_nothing_else(tmp_path):
    dead = _dead_pid()
    temp = ["images.csv.tmp", "review.json.tmp", "objects.parquet.tmp", "dataset.npz.tmp.npz", f"run.json.tmp-{dead}",
            f"config.yaml.tmp-{dead}", f"checkpoint.pt.tmp-{dead}", f"object_features.npy.tmp-{dead}",
            f".write-probe-{dead}", f"cache/images.u8.tmp-{dead}", f"cache/crops.u8.tmp-{dead}",
            f"cache/meta.tmp-{dead}.npz", f"cache/decode-progress.tmp-{dead}.npz", f"cache/problems.json.tmp-{dead}",
            f"cache/.write-probe-{dead}", f"crossfit/fold_2.tmp-{dead}.npz", f"crossfit/predictions.tmp-{dead}.npz",
            f"crossfit/places.tmp-{dead}.npy",
            f"report/.index.html.tmp-{dead}", f"plots/causes_loc.png.tmp-{dead}"]
    temp_dirs = [f"log/epoch_0003.tmp-{dead}", f"log/epoch_0001.rank1.tmp-{dead}", "log/epoch_0002.rank0"]
    keep = ["images.csv", "notes.tmp.txt", "my.tmp-x", "cache/images.u8", "cache/images.u8.partial",
            "cache/decode-progress.npz", "log/epoch_0001/image.loc_sum.npy", "report/index.html",
            "crossfit/fold_0.npz", "report/thumbs/a.jpg.tmp", "other/x.json.tmp-1",
            f"run.json.tmp-{os.getppid()}"]                     # a live process's: left alone
    for rel in temp + keep:
        (tmp_path / rel).parent.mkdir(parents=True, exist_ok=True)
        (tmp_path / rel).write_bytes(b"x" * 1000)
    for rel in temp_dirs:
        (tmp_path / rel).mkdir(parents=True)
        (tmp_path / rel / "image.loc_sum.npy").write_bytes(b"x" * 1000)
    assert [p.relative_to(tmp_path).as_posix() for p in find_leftovers(tmp_path)] == sorted(temp + temp_dirs)
    count, freed = remove_leftovers(tmp_path)
    assert count == len(temp + temp_dirs) and freed >= 1000 * count
    assert all((tmp_path / rel).exists() for rel in keep)
    assert find_leftovers(tmp_path) == []
    line = leftovers.leftovers_line(tmp_path, count, freed)
    assert re.fullmatch(r"detdiff: removed 23 temporary files of an interrupted run from .+ "
                        r"\([\d.]+ (?:kB|MB) reclaimed\)", line)


def test_every_temp_name_in_the_code_is_listed():
    """A module that builds a temporary name must be the writer of an entry of TEMP_NAMES (or only remove one)."""
    package = Path(leftovers.__file__).resolve().parent
    naming = re.compile(r"\.tmp\b|tmp-\{|\.write-probe-|tmp_tag")
    writers = {t.writer for t in TEMP_NAMES}
    removers = {"detdiff/train/hooks.py", "detdiff/leftovers.py", "detdiff/fault_hook.py"}
    found = {f"detdiff/{p.relative_to(package).as_posix()}" for p in package.rglob("*.py")
             if naming.search(p.read_text())}
    assert found - removers <= writers, sorted(found - removers - writers)
    assert writers <= found


def _demo_dataset(root: Path, num_images: int = 24):
    paths = generate_demo(root / "demo", num_images=num_images, seed=5, width=128, height=96, progress=False)
    return paths, build_dataset(read_coco_json(paths.annotations), images_dir=paths.images_dir)


@pytest.mark.parametrize("codec", ["raw", "jpeg"])
def test_interrupted_cache_build_decodes_only_the_rest_and_equals_a_clean_build(tmp_path, monkeypatch, codec):
    _, dataset = _demo_dataset(tmp_path)
    options = dict(max_pixels=10**8, progress=False, workers=1, with_crops=True, codec=codec)
    clean = build_image_cache(dataset, tmp_path / "clean", 64, **options)
    decode = DecodeInterrupt(monkeypatch, stop_after=10)
    monkeypatch.setattr(image_cache, "PROGRESS_EVERY_S", 3600.0)       # saved on the way out, not by time
    with pytest.raises(KeyboardInterrupt):
        build_image_cache(dataset, tmp_path / "cache", 64, **options)
    names = image_cache.stored_names(codec)
    assert sorted(p.name for p in (tmp_path / "cache").iterdir()) == sorted(
        [names["crops"] + ".partial", "decode-progress.npz", names["images"] + ".partial"])
    if codec == "jpeg":             # rows written after the last saved progress (a kill in between) are cut off
        with open(tmp_path / "cache" / (names["images"] + ".partial"), "ab") as fh:
            fh.write(b"half a row")
    decode.resume()
    resumed = build_image_cache(dataset, tmp_path / "cache", 64, **options)
    assert decode.calls == list(range(10, dataset.num_images))
    for name in (names["images"], names["crops"], "problems.json", "fingerprint.json"):
        assert (tmp_path / "cache" / name).read_bytes() == (tmp_path / "clean" / name).read_bytes(), name
    assert np.array_equal(resumed.pixel, clean.pixel, equal_nan=True) and np.array_equal(resumed.scale, clean.scale)
    assert np.array_equal(resumed.images[:], clean.images[:]) and np.array_equal(resumed.crops[:], clean.crops[:])
    assert sorted(p.name for p in (tmp_path / "cache").iterdir()) == sorted(p.name for p in clean.cache_dir.iterdir())


WORKERS_CHILD = textwrap.dedent(r"""
    import os, sys, time
    from detdiff.data import image_cache
    from detdiff.data.coco import build_dataset, read_coco_json

    real = image_cache._decode_task
    def slow(task):                         # same pixels, slower: the parent is killed mid-decode
        time.sleep(0.2)
        os.write(1, f"worker {os.getpid()}\n".encode())   # one write: lines of two workers never interleave
        return real(task)
    image_cache._decode_task = slow
    dataset = build_dataset(read_coco_json(sys.argv[1]), images_dir=sys.argv[2])
    image_cache.build_image_cache(dataset, sys.argv[3], 64, max_pixels=10**8, progress=False, workers=2)
""")


@linux_only
def test_decode_workers_end_quietly_with_their_killed_parent(tmp_path):
    paths, _ = _demo_dataset(tmp_path, num_images=40)
    (tmp_path / "child.py").write_text(WORKERS_CHILD)
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(Path(leftovers.__file__).parents[1]),
                                                       os.environ.get("PYTHONPATH", "")]))
    proc = subprocess.Popen([sys.executable, str(tmp_path / "child.py"), str(paths.annotations),
                             str(paths.images_dir), str(tmp_path / "cache")], env=env,
                            stdout=subprocess.PIPE, stderr=subprocess.STDOUT, text=True)
    seen: set[str] = set()
    while len(seen) < 2:
        line = proc.stdout.readline()
        assert line.startswith("worker "), f"the child ended or failed before both workers ran: {line!r}"
        seen.add(line.split()[1])
    os.kill(proc.pid, signal.SIGKILL)
    rest: list[str] = []                                  # read() returns once no worker holds the pipe any more
    reader = threading.Thread(target=lambda: rest.append(proc.stdout.read()), daemon=True)
    reader.start()
    reader.join(timeout=30)
    assert rest, "a decode worker outlived its killed parent by 30 s"
    assert "Traceback" not in rest[0] and "Error" not in rest[0], rest[0]
    proc.wait(timeout=30)
    time.sleep(0.2)
    for pid in seen:
        assert not Path(f"/proc/{pid}").exists() or "Z" in Path(f"/proc/{pid}/stat").read_text().split()[2]


@pytest.fixture(scope="module")
def small_audit(tmp_path_factory):
    root = tmp_path_factory.mktemp("faults")
    paths, _ = _demo_dataset(root)
    audit = Audit(paths.annotations, paths.images_dir)
    launch, stats = audit.trace(root / "reference")
    assert launch.returncode == 0, launch.stderr
    return audit, root / "reference", stats


#: The short CI chain: one fault per stage, kill and full disk taking turns, each run resuming the last
#: (bench_faults.py runs both faults in every stage, each from a fresh run).
CHAIN = [(name, "kill" if i % 2 == 0 else "enospc") for i, name in enumerate(STAGES)]


@pytest.mark.slow
@linux_only
def test_a_fault_in_every_stage_then_resume_equals_an_uninterrupted_run(small_audit, tmp_path):
    audit, reference, stats = small_audit
    rng = np.random.default_rng(SEED)
    run, problems, reclaimed = tmp_path / "run", [], 0
    for number, (name, kind) in enumerate(CHAIN):
        launch = audit.launch(run, fault=fault_spec(name, kind, float(rng.uniform()), stats[name]),
                              resume=number > 0)
        problems += [f"{launch.fault}: {p}" for p in check_launch(launch, kind)]
        reclaimed += "temporary file" in launch.stderr
    if not reclaimed:           # whether a kill leaves temporary files depends on its moment: leave one for sure
        dead = subprocess.Popen([sys.executable, "-c", "pass"])
        dead.wait()
        (run / f"checkpoint.pt.tmp-{dead.pid}").write_bytes(b"x" * 4096)
    last = audit.launch(run, resume=True)
    assert last.returncode == 0 and not last.tracebacks, last.stderr
    assert not problems, problems
    comparison = compare_runs(run, reference)
    assert comparison.ok, comparison
    assert reclaimed + ("temporary file" in last.stderr) >= 1      # what a killed run left is reclaimed
