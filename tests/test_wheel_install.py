"""The built wheel installs and runs as an ordinary package, away from the checkout.

The wheel is built from a copy of the sources (``pip wheel --no-deps --no-build-isolation``: the test
extras pin ``setuptools>=77``, so nothing is downloaded and no stale ``build/`` of the checkout is reused),
installed with ``--no-deps`` into a fresh virtual environment that sees the test environment's installed
dependencies through a ``.pth`` line (so torch is not installed twice), and driven from a temporary folder:
``detdiff config``, ``detdiff demo``, a one-epoch ``detdiff audit`` with a tiny config file, ``detdiff
report`` and ``detdiff.open_run``. ``venv --system-site-packages`` would not do: from inside a virtual
environment it exposes the base interpreter's packages, not the test environment's.
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import sysconfig
import zipfile
from pathlib import Path

import pytest
import yaml

pytestmark = [pytest.mark.slow, pytest.mark.wheel]

ROOT = Path(__file__).resolve().parent.parent
TINY_CONFIG = {
    "data": {"image_size": 64},
    "model": {"width": 8, "head_width": 16},
    "train": {"batch_size": 4, "warmup_iters": 2, "threads": 2},
    "report": {"top": 4, "thumbnail_size": 64},
}


def _run(argv: list[str], cwd: Path, env: dict[str, str]) -> str:
    """Run ``argv`` and return its stdout; on failure the assertion shows both streams."""
    done = subprocess.run(argv, cwd=cwd, env=env, capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, f"{' '.join(argv)} -> {done.returncode}\n{done.stdout}\n{done.stderr}"
    return done.stdout


def _build_wheel(tmp: Path) -> Path:
    """Build the wheel from a copy of what a source distribution holds; return its path."""
    src = tmp / "src"
    shutil.copytree(ROOT / "detdiff", src / "detdiff", ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))
    for path in [ROOT / "pyproject.toml", ROOT / "README.md", *ROOT.glob("LICEN[CS]E*")]:
        shutil.copy2(path, src / path.name)
    _run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation", "--no-index",
          "--wheel-dir", str(tmp / "dist"), str(src)], cwd=tmp, env=dict(os.environ))
    (wheel,) = (tmp / "dist").glob("detdiff-*.whl")
    return wheel


def _fresh_env(tmp: Path, wheel: Path) -> tuple[Path, dict[str, str]]:
    """A new virtual environment holding only the wheel (dependencies seen from the test environment)."""
    venv = tmp / "venv"
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True, timeout=120)
    python = venv / "bin" / "python"
    purelib = subprocess.run([str(python), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                             capture_output=True, text=True, check=True).stdout.strip()
    outer = dict.fromkeys(sysconfig.get_paths()[key] for key in ("purelib", "platlib"))
    # plain path lines: the test environment's own .pth files (its editable detdiff) are not processed
    (Path(purelib) / "_test_env_dependencies.pth").write_text("\n".join(outer) + "\n")
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME", "VIRTUAL_ENV")}
    env["PATH"] = f"{venv / 'bin'}{os.pathsep}{env.get('PATH', '')}"
    _run([sys.executable, "-m", "pip", "--python", str(python), "install", "--no-deps", "--no-index", "--quiet",
          str(wheel)], cwd=tmp, env=env)
    return venv, env


def test_wheel_installs_and_runs_outside_the_checkout(tmp_path: Path) -> None:
    wheel = _build_wheel(tmp_path)
    names = zipfile.ZipFile(wheel).namelist()
    assert {f"detdiff/configs/{n}.yaml" for n in ("default", "topdown", "fast", "ci")} <= set(names)
    assert "detdiff/report/assets/report.css" in names

    venv, env = _fresh_env(tmp_path, wheel)
    work = tmp_path / "work"
    work.mkdir()
    detdiff = str(venv / "bin" / "detdiff")
    python = str(venv / "bin" / "python")

    where = _run([python, "-c", "import detdiff, detdiff.config as c; print(detdiff.__file__); "
                                "print(c.DEFAULT_CONFIG)"], cwd=work, env=env).split()
    assert all(Path(p).is_relative_to(venv) for p in where), where
    assert not any(Path(p).is_relative_to(ROOT) for p in where), where
    assert "ci" in _run([detdiff, "config", "list"], cwd=work, env=env)
    assert "image_size: 128" in _run([detdiff, "config", "show", "ci"], cwd=work, env=env)

    _run([detdiff, "demo", "--out", "demo", "--num-images", "12", "--quiet"], cwd=work, env=env)
    (work / "tiny.yaml").write_text(yaml.safe_dump(TINY_CONFIG))
    _run([detdiff, "audit", "demo/annotations.json", "--images", "demo/images", "--out", "run",
          "--config", "tiny.yaml", "--epochs", "1", "--flips", "none", "--no-report", "--quiet"], cwd=work, env=env)
    saved = yaml.safe_load((work / "run" / "config.yaml").read_text())
    assert saved["train"]["epochs"] == 1 and saved["train"]["flips"] == "none"
    assert saved["model"]["width"] == 8
    assert saved["log"] == yaml.safe_load(Path(where[1]).read_text())["log"]     # the rest: the packaged default

    assert "report:" in _run([detdiff, "report", "run"], cwd=work, env=env)
    assert (work / "run" / "report" / "index.html").is_file()
    assert list((work / "run" / "plots").glob("*.png"))
    opened = _run([python, "-c", "import detdiff; run = detdiff.open_run('run'); "
                                 "print(detdiff.__file__, len(run.images), len(run.objects))"], cwd=work, env=env)
    module, images, objects = opened.split()
    assert Path(module).is_relative_to(venv) and int(images) == 12 and int(objects) > 0
