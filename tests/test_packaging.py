"""A normal install carries the whole application, dashboard included.

The wheel is built from a copy of the working tree with this virtualenv's setuptools
and installed into a fresh virtualenv.  Nothing is downloaded: the dependencies are
made visible through a .pth file naming a folder of links to this virtualenv's
packages, minus its editable install of cuewatch, so the project itself can only come
from the wheel.  Every command runs from a folder outside the repository.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import socket
import subprocess
import sys
import sysconfig
import time
import urllib.error
import urllib.request
import zipfile
from pathlib import Path

import pytest
from helpers.configs import REPO, make_config
from helpers.files import decision_row, write_csv

pytestmark = pytest.mark.slow

# What the install needs besides the package modules.
PACKAGE_DIRS = ("monitor", "dashboards", "synthetic_logs")
SAMPLE_DIR = "synthetic_logs/sample/"


def _run(cmd: list[str], *, cwd: Path, timeout: float = 300, env=None):
    proc = subprocess.run(
        cmd, cwd=cwd, env=env, capture_output=True, text=True, timeout=timeout, check=False
    )
    assert proc.returncode == 0, f"{cmd} exited {proc.returncode}:\n{proc.stderr[-3000:]}"
    return proc


def tree_files() -> list[str]:
    """The working tree's files as git sees them: tracked and new, minus ignored ones
    (build/, *.egg-info, .venv, caches) and tracked files deleted in the tree."""
    out = _run(["git", "ls-files", "-z", "--cached", "--others", "--exclude-standard"],
               cwd=REPO, timeout=60).stdout  # fmt: skip
    return sorted({p for p in out.split("\0") if p and (REPO / p).is_file()})


@pytest.fixture(scope="module")
def wheel(tmp_path_factory) -> Path:
    """The wheel of the working tree.  Built from a copy so that setuptools' build/
    folder neither lands in the checkout nor leaks files deleted since into the wheel."""
    root = tmp_path_factory.mktemp("wheel")
    src = root / "src"
    for rel in tree_files():
        (src / rel).parent.mkdir(parents=True, exist_ok=True)
        shutil.copy2(REPO / rel, src / rel)
    dist = root / "dist"
    _run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation",
          "--no-index", "-w", str(dist), str(src)], cwd=root)  # fmt: skip
    (built,) = dist.glob("cuewatch-*.whl")
    return built


def clean_env(**extra: str) -> dict[str, str]:
    """This process's environment without anything that would point Python at the
    repository or at a configuration."""
    drop = {"PYTHONPATH", "PYTHONHOME", "PYTHONSTARTUP", "VIRTUAL_ENV", "CUEWATCH_CONFIG"}
    env = {k: v for k, v in os.environ.items() if k not in drop}
    env.update(extra)
    return env


def dependency_links(folder: Path) -> Path:
    """A folder of links to this virtualenv's installed packages, minus cuewatch's own
    (its editable-install finder and metadata) and the .pth start-up files.

    It is named site-packages on purpose: Streamlit switches on its development mode,
    which refuses --server.port, when its own path has no "site-packages" in it."""
    links = folder / "site-packages"
    links.mkdir(parents=True)
    sources = {Path(sysconfig.get_paths()[k]) for k in ("purelib", "platlib")}
    for source in sources:
        for entry in source.iterdir():
            name = entry.name
            if name.startswith(("__editable__", "cuewatch")) or name.endswith(".pth"):
                continue
            if not (links / name).exists():
                (links / name).symlink_to(entry)
    return links


class Installed:
    def __init__(self, venv: Path, cwd: Path) -> None:
        self.venv = venv
        self.cwd = cwd  # outside the repository
        self.bin = venv / "bin"

    def site_packages(self) -> Path:
        (found,) = self.venv.glob("lib/python*/site-packages")
        return found

    def python(self, code: str, **env: str) -> str:
        return _run([str(self.bin / "python"), "-c", code], cwd=self.cwd,
                    env=clean_env(**env)).stdout  # fmt: skip

    def cuewatch(self, *args: str, check: bool = True) -> subprocess.CompletedProcess:
        proc = subprocess.run([str(self.bin / "cuewatch"), *args], cwd=self.cwd,
                              env=clean_env(), capture_output=True, text=True, timeout=300)  # fmt: skip
        if check:
            assert proc.returncode == 0, proc.stderr[-3000:]
        return proc


@pytest.fixture(scope="module")
def installed(wheel, tmp_path_factory) -> Installed:
    root = tmp_path_factory.mktemp("installed")
    assert not root.is_relative_to(REPO)
    venv = root / "venv"
    _run([sys.executable, "-m", "venv", str(venv)], cwd=root)
    _run([str(venv / "bin" / "pip"), "install", "--no-index", "--no-deps", str(wheel)],
         cwd=root, env=clean_env())  # fmt: skip
    inst = Installed(venv, root)
    links = dependency_links(root / "deps")
    (inst.site_packages() / "cuewatch_test_dependencies.pth").write_text(f"{links}\n")
    return inst


def test_the_wheel_holds_every_module_page_and_sample_file(wheel):
    names = set(zipfile.ZipFile(wheel).namelist())
    assert "dashboards/app.py" in names and "monitor/dashboard/serve.py" in names
    pages = sorted(p.name for p in (REPO / "dashboards").glob("page_*.py"))
    assert pages, "no dashboard pages found in the repository"
    assert {f"dashboards/{p}" for p in pages} <= names
    # Every module of the three packages, so a subpackage left out of pyproject's
    # explicit package list fails here, and the sample logs (package data).
    tree = tree_files()
    modules = {f for f in tree if f.startswith(PACKAGE_DIRS) and f.endswith(".py")}
    sample = {f for f in tree if f.startswith(SAMPLE_DIR)}
    assert (
        modules and any(f.endswith(".csv") for f in sample) and SAMPLE_DIR + "truth.json" in sample
    )
    assert sorted(modules - names) == []
    assert sorted(sample - names) == []


def test_the_project_is_imported_from_the_wheel_only(installed):
    code = """
import json, sys
import importlib.metadata as md
import monitor, dashboards, monitor.cli, monitor.dashboard.serve, dashboards.ui, streamlit
from monitor.dashboard.start import app_path
files = [getattr(m, "__file__", None) for m in list(sys.modules.values())]
print(json.dumps({
    "monitor": monitor.__file__, "dashboards": dashboards.__file__, "app": str(app_path()),
    "dist": str(md.distribution("cuewatch").locate_file("monitor/__init__.py")),
    "streamlit": streamlit.__file__, "files": [f for f in files if f],
}))
"""
    doc = json.loads(installed.python(code))
    site = installed.site_packages()
    for key in ("monitor", "dashboards", "app", "dist"):
        assert Path(doc[key]).is_relative_to(site), (key, doc[key])
    assert Path(doc["app"]).name == "app.py"
    # The dependencies come through the links, and nothing at all from the repository.
    assert not Path(doc["streamlit"]).is_relative_to(site)
    assert [f for f in doc["files"] if Path(f).is_relative_to(REPO)] == []


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _get(url: str) -> tuple[int, bytes] | None:
    try:
        with urllib.request.urlopen(url, timeout=2) as r:
            return r.status, r.read()
    except (urllib.error.URLError, OSError):
        return None


@pytest.fixture(scope="module")
def small_store(installed, tmp_path_factory) -> Path:
    """A store with a dozen decisions, made by the installed command line."""
    root = tmp_path_factory.mktemp("store")
    cfg = make_config(root)
    rows = write_csv(root / "decisions.csv", [decision_row(i) for i in range(12)])
    installed.cuewatch("--config", str(cfg), "init")
    out = installed.cuewatch("--config", str(cfg), "ingest", "--kind", "decisions", "--json",
                             str(rows)).stdout  # fmt: skip
    assert json.loads(out)["accepted"] == 12
    return cfg


def test_the_installed_dashboard_renders_its_first_page(installed, small_store):
    # Streamlit's own test harness runs the installed app.py and its first page.
    code = """
import json
from streamlit.testing.v1 import AppTest
from monitor.dashboard.start import app_path
at = AppTest.from_file(str(app_path()), default_timeout=60)
at.run()
print(json.dumps({"errors": [str(e.value) for e in at.exception],
                  "titles": [t.value for t in at.title]}))
"""
    doc = json.loads(installed.python(code, CUEWATCH_CONFIG=str(small_store)).splitlines()[-1])
    assert doc["errors"] == []
    assert doc["titles"] == ["Team at a glance"]


def test_cuewatch_dashboard_from_the_wheel_serves_and_stops_on_sigterm(installed, small_store):
    port = _free_port()
    log = installed.cwd / f"dashboard-{port}.log"
    with open(log, "wb") as out:
        proc = subprocess.Popen(
            [str(installed.bin / "cuewatch"), "--config", str(small_store), "dashboard",
             "--port", str(port)],
            cwd=installed.cwd, env=clean_env(), stdout=out, stderr=subprocess.STDOUT,
        )  # fmt: skip
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 90
        while _get(f"{base}/_stcore/health") != (200, b"ok"):
            assert proc.poll() is None, f"exited {proc.returncode}: {log.read_text()[-3000:]}"
            assert time.monotonic() < deadline, f"no health answer: {log.read_text()[-3000:]}"
            time.sleep(0.25)
        status, body = _get(base + "/") or (None, b"")
        assert status == 200 and b"<html" in body.lower()
        proc.send_signal(signal.SIGTERM)
        assert proc.wait(timeout=30) is not None
        deadline = time.monotonic() + 15
        while _get(f"{base}/_stcore/health") is not None and time.monotonic() < deadline:
            time.sleep(0.25)
        assert _get(f"{base}/_stcore/health") is None, "the server outlived `cuewatch dashboard`"
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait(timeout=10)


def test_the_demo_from_a_wheel_says_in_one_line_that_it_needs_a_checkout(installed):
    # config/ostwyn.toml is not package data, so the wheel's demo cannot run; it must
    # say so (exit 2, one line) before generating anything.  Should the configuration
    # ever ship in the wheel, this test should run the demo instead.
    folder = installed.cwd / "demo"
    proc = installed.cuewatch("demo", "--dir", str(folder), "--no-dashboard", "--days", "28",
                              "--handlers", "6", "--daily-tail", "0", check=False)  # fmt: skip
    assert proc.returncode == 2, proc.stderr[-3000:]
    assert "Traceback" not in proc.stderr
    assert "config/ostwyn.toml" in proc.stderr and "checkout" in proc.stderr
    assert not (folder / "scenario").exists()
