"""A plain wheel install works outside the clone (README, "Installing on a workstation").

One module-scoped fixture builds a wheel of this source tree (``pip wheel --no-deps``, the
build backend of ``pyproject.toml``), makes a fresh virtual environment in a temporary folder
outside the clone and installs the wheel into it, not editable. Every test then runs a command
of that environment from a folder of its own outside the clone, so nothing of the source tree
can be found by accident: ``livedyn`` must find its presets, its bench harness, the C twin's
source and its templates as package data.

Speed: the dependencies (numpy, numba, scipy, ...) are not installed again. The fresh
environment reads them from the running interpreter's site-packages through a path file
(``deps.pth``), which adds that folder to ``sys.path`` after the environment's own
site-packages. A path file's folder is not scanned for further ``.pth`` files (Python's
``site`` module documentation), so the editable install of livedyn in the project's
environment stays invisible; each test asserts that ``livedyn`` was imported from the fresh
environment, and ``pip check`` confirms that the wheel's declared requirements are met there.
Set ``LIVEDYN_WHEEL_FULL=1`` to install the dependencies from pip's cache instead (slower).
"""
from __future__ import annotations

import os
import re
import shutil
import subprocess
import sys
import sysconfig
import time
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
TIMEOUT = 600  # generous: a loaded machine compiles the kernels slowly
SHIPPED = ["bed-under-narrator", "drums-ceiling", "drums-tame", "narrator-expand",
           "narrator-gate", "narrator-level"]


def _run(cmd, cwd, env, timeout=TIMEOUT):
    r = subprocess.run([str(c) for c in cmd], cwd=cwd, env=env, capture_output=True, text=True,
                       timeout=timeout)
    assert r.returncode == 0, f"{cmd}: exit {r.returncode}\n{r.stdout[-2000:]}\n{r.stderr[-2000:]}"
    return r


class Installed:
    """The fresh environment: its interpreter, its ``livedyn`` and a clean environment."""

    def __init__(self, base):
        self.base = base
        self.venv = base / "venv"
        self.python = self.venv / "bin" / "python"
        self.livedyn = self.venv / "bin" / "livedyn"
        self.cache = base / "cache"
        self.times = {}
        env = {k: v for k, v in os.environ.items()
               if k not in ("PYTHONPATH", "VIRTUAL_ENV", "NUMBA_CACHE_DIR", "LIVEDYN_PRESETS")}
        env["XDG_CACHE_HOME"] = str(self.cache)  # the C twin's build goes here
        env["PATH"] = f"{self.venv / 'bin'}{os.pathsep}{env.get('PATH', '')}"
        self.env = env

    def folder(self, name):
        d = self.base / "work" / name
        d.mkdir(parents=True)
        assert ROOT not in d.parents
        return d

    def site_packages(self):
        r = _run([self.python, "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                 self.base, self.env)
        return Path(r.stdout.strip())


@pytest.fixture(scope="module")
def installed(tmp_path_factory):
    base = tmp_path_factory.mktemp("wheel")
    if ROOT in base.parents:
        pytest.fail(f"the temporary folder {base} is inside the clone; set --basetemp elsewhere")
    inst = Installed(base)
    pip = [sys.executable, "-m", "pip"]
    t0 = time.monotonic()
    _run(pip + ["wheel", "-q", "--no-deps", "-w", base / "dist", ROOT], base, inst.env)
    wheels = list((base / "dist").glob("livedyn-*.whl"))
    assert len(wheels) == 1, wheels
    t1 = time.monotonic()
    full = os.environ.get("LIVEDYN_WHEEL_FULL") == "1"
    _run([sys.executable, "-m", "venv", "--without-pip", inst.venv], base, inst.env)
    if not full:
        purelib = inst.site_packages()
        own = sysconfig.get_paths()
        deps = sorted({own["purelib"], own["platlib"]})
        (purelib / "deps.pth").write_text("".join(d + "\n" for d in deps))
    _run(pip + ["--python", inst.python, "install", "-q"] + ([] if full else ["--no-deps"])
         + [wheels[0]], base, inst.env)
    inst.times["build wheel"] = t1 - t0
    inst.times["venv and install"] = time.monotonic() - t1
    # The generated kernel modules (float32 variants, setting variants) are keyed by a hash of
    # the dsp sources, which the wheel ships unchanged: the ones this test run has compiled
    # already are valid for it, so they are copied into its fresh cache rather than compiled
    # a second time (the C twin and the bare loops are still built there from nothing; on a
    # fresh machine the tests before this one compiled the generated modules from nothing).
    from livedyn.shipped import cache_folder

    for kind in ("float32", "variants"):
        src = cache_folder(kind)
        if src.is_dir():
            shutil.copytree(src, inst.cache / "livedyn" / kind, dirs_exist_ok=True)
    yield inst
    print("\nwheel test times: " + ", ".join(f"{k} {v:.1f} s" for k, v in inst.times.items()))


def _timed(inst, what, cmd, cwd):
    t0 = time.monotonic()
    r = _run(cmd, cwd, inst.env)
    inst.times[what] = time.monotonic() - t0
    return r


def test_installed_not_editable(installed):
    here = installed.folder("where")
    r = _run([installed.python, "-c", "import livedyn, sys; print(livedyn.__file__)"], here,
             installed.env)
    path = Path(r.stdout.strip()).resolve()
    assert installed.site_packages().resolve() in path.parents, path
    assert ROOT not in path.parents
    # the wheel's declared requirements are met in this environment
    r = _run([installed.python, "-m", "pip", "check"] if (installed.venv / "bin" / "pip").exists()
             else [sys.executable, "-m", "pip", "--python", installed.python, "check"], here,
             installed.env)
    assert "No broken requirements" in r.stdout


def test_presets_lists_the_shipped_ones(installed):
    r = _timed(installed, "presets", [installed.livedyn, "presets"], installed.folder("presets"))
    names = [line.split()[0] for line in r.stdout.splitlines() if line.strip()]
    assert names == SHIPPED
    r = _run([installed.livedyn, "presets", "--show", "drums-tame"], installed.folder("show"),
             installed.env)
    assert 'algorithm = "compressor"' in r.stdout


def test_python_m_livedyn_help(installed):
    r = _timed(installed, "python -m livedyn --help",
               [installed.python, "-m", "livedyn", "--help"], installed.folder("help"))
    assert r.stdout.startswith("usage: livedyn")
    for word in ("render", "measure", "demo", "bench", "presets", "new-algorithm", "check"):
        assert word in r.stdout


def test_demo_offline(installed):
    here = installed.folder("demo")
    r = _timed(installed, "demo --offline-only",
               [installed.livedyn, "demo", "--offline-only", "--out", "d", "--seconds", "2"], here)
    for name in SHIPPED:
        assert (here / "d" / f"{name}.wav").stat().st_size > 44
    # one summary per shipped preset, each naming the preset's output file
    assert r.stdout.count("integrated loudness") == len(SHIPPED), r.stdout
    for name in SHIPPED:
        assert f"-> {name}.wav" in r.stdout


def test_bench_kernels_quick(installed):
    here = installed.folder("bench")
    r = _timed(installed, "bench kernels --quick",
               [installed.livedyn, "bench", "kernels", "--quick"], here)
    for case in ("compressor", "limiter", "expander", "gate", "ducker"):
        assert re.search(rf"^{case}\b.*bit-identical", r.stdout, re.M), r.stdout
    assert "MISMATCH" not in r.stdout
    # the C twin (where a compiler exists) is built in the user's cache, not in the package
    site = installed.site_packages() / "livedyn"
    assert not list(site.rglob("*.so"))
    if "C twin skipped" not in r.stdout + r.stderr:
        assert list((installed.cache / "livedyn" / "ctwin").glob("ctwin-*.so"))
    # the bare-C table: its sources are package data, its library goes to the user's cache
    if "bare-C loops skipped" not in r.stdout + r.stderr:
        for prec in ("float64", "float32"):
            assert re.search(rf"^compressor\s+64 {prec}\s+(bit-identical|ok )", r.stdout,
                             re.M), r.stdout
        assert list((installed.cache / "livedyn" / "bare").glob("bare-*.so"))


def test_new_algorithm_then_check(installed):
    here = installed.folder("algo")
    r = _timed(installed, "new-algorithm x", [installed.livedyn, "new-algorithm", "x"], here)
    assert (here / "x.py").is_file() and "wrote x.py" in r.stdout
    r = _timed(installed, "check x.py", [installed.livedyn, "check", "x.py"], here)
    assert "checks passed" in r.stdout and "time per frame" in r.stdout
    # a shipped example, copied out of the package data
    _run([installed.livedyn, "new-algorithm", "mine", "--example", "speech_key"], here,
         installed.env)
    text = (here / "mine.py").read_text()
    assert "def detector" in text and "def gain_curve" in text
