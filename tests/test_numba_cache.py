"""numba keys a cached kernel on its own file only; livedyn drops its caches when any of its
sources changes, so a kernel never runs stale code compiled against an older callee."""
import os
import shutil
import subprocess
import sys
from pathlib import Path

import livedyn


def test_changed_sources_drop_the_cached_machine_code(tmp_path):
    src = Path(livedyn.__file__).resolve().parent
    pkg = tmp_path / "livedyn"
    shutil.copytree(src, pkg, ignore=shutil.ignore_patterns("*.nbi", "*.nbc", "*.pyc"))
    cache = pkg / "dsp" / "__pycache__"
    cache.mkdir(exist_ok=True)
    fake = cache / "dynamics.dynamics_block-1.py311.nbi"
    env = {k: v for k, v in os.environ.items() if k != "NUMBA_CACHE_DIR"}
    env["PYTHONPATH"] = str(tmp_path)

    def run():
        subprocess.run([sys.executable, "-c", "import livedyn"], env=env, check=True,
                       cwd=tmp_path, timeout=60)

    run()  # first import: writes the stamp
    fake.write_text("cached code")
    run()  # sources unchanged: the cache stays
    assert fake.exists()
    with open(pkg / "dsp" / "stages.py", "a") as f:
        f.write("\n# a changed callee\n")
    run()  # a source changed: every cached kernel goes
    assert not fake.exists()
