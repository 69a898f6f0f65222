"""Packaging: cubecast installs as the import packages `cubecast.daemon` and `cubecast.viewer`, so it
shares one environment with python-daemon (whose import package is `daemon`) without overwriting or,
on uninstall, deleting any of its files.

This installs from the package index into a fresh virtual environment (as CI does for the project
itself); without the index the test fails rather than skipping.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
import sysconfig
import venv
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent


def _run(cmd, **kw):
    r = subprocess.run(cmd, capture_output=True, text=True, timeout=600, **kw)
    assert r.returncode == 0, f"{cmd}: {r.stdout[-2000:]}\n{r.stderr[-2000:]}"
    return r.stdout


def test_installs_beside_python_daemon_and_uninstalls_cleanly(tmp_path):
    src = tmp_path / "src"
    src.mkdir()
    for name in ("pyproject.toml", "README.md", "LICENSE"):
        shutil.copy(ROOT / name, src / name)
    for name in ("daemon", "viewer"):
        shutil.copytree(ROOT / name, src / name, ignore=shutil.ignore_patterns("__pycache__"))
    env_dir = tmp_path / "venv"
    venv.create(env_dir, with_pip=True)
    py = str(env_dir / "bin" / "python")
    site = Path(_run([py, "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"]).strip())
    # cubecast's own dependencies (numpy, scipy, numba, ...) come from the environment running the tests,
    # appended after the new environment's own site-packages.
    (site / "zz_test_dependencies.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")

    _run([py, "-m", "pip", "install", "-q", "python-daemon"])
    _run([py, "-m", "pip", "install", "-q", "--no-deps", str(src)])
    both = ("import daemon, cubecast.daemon, cubecast.viewer, cubecast.daemon.cli; "
            "assert hasattr(daemon, 'DaemonContext'), daemon.__file__; "
            "assert cubecast.daemon.__file__.endswith('cubecast/daemon/__init__.py'), cubecast.daemon.__file__; "
            "print(daemon.__file__)")
    daemon_file = Path(_run([py, "-c", both], cwd=tmp_path).strip())
    assert daemon_file.parent.parent == site
    assert (site / "cubecast" / "daemon" / "chain" / "pipeline.py").is_file()
    # the command line entry point of the installed copy
    assert "COMMAND" in _run([str(env_dir / "bin" / "cubecast"), "--help"], cwd=tmp_path)

    _run([py, "-m", "pip", "uninstall", "-y", "-q", "cubecast"])
    left = [p for p in (site / "cubecast").rglob("*") if p.is_file()] if (site / "cubecast").exists() else []
    assert not left, left   # pip may leave the empty namespace folder, nothing in it
    _run([py, "-c", "import daemon; daemon.DaemonContext"], cwd=tmp_path)
    r = subprocess.run([py, "-c", "import cubecast.daemon"], cwd=tmp_path, capture_output=True, text=True)
    assert r.returncode != 0 and "No module named 'cubecast" in r.stderr, r.stderr
