"""The Makefile's test prerequisites (Debian's chromium, the openssl CLI): with one missing
and apt unable to install it, CI (CI=true) stops `make test` with a clear message before
any test runs; elsewhere make warns and the tests go on (the ones that need it skip).

Each case runs a copy of the Makefile in a temporary folder with fakes for apt-get, the
programs and the virtualenv's ruff and python, so nothing is installed and no suite runs.
"""

from __future__ import annotations

import os
import shutil
import subprocess
from pathlib import Path

import pytest
from helpers.configs import REPO

MAKE = shutil.which("make") or "make"
FAKE_APT = """#!/bin/sh
# Records its arguments; installs (creates $FAKE_APT_CREATES) only when told to.
echo "apt-get $*" >> "$FAKE_LOG"
[ -n "$FAKE_APT_CREATES" ] || exit 100
if [ "$1" = install ]; then printf '#!/bin/sh\\n' > "$FAKE_APT_CREATES"; chmod +x "$FAKE_APT_CREATES"; fi
"""
FAKE_TOOL = """#!/bin/sh
echo "$(basename "$0") $*" >> "$FAKE_LOG"
"""
AS_ROOT = os.geteuid() == 0  # the Makefile tries apt only as root


def _script(path: Path, text: str) -> Path:
    path.parent.mkdir(parents=True, exist_ok=True)
    path.write_text(text, encoding="utf-8")
    path.chmod(0o755)
    return path


class Make:
    """A copy of the Makefile whose programs are fakes under ``root``."""

    def __init__(self, root: Path) -> None:
        self.root = root
        self.makefile = root / "Makefile"
        shutil.copy(REPO / "Makefile", self.makefile)
        self.log = root / "calls.log"
        self.log.touch()
        self.apt = _script(root / "fakes" / "apt-get", FAKE_APT)
        self.present = _script(root / "fakes" / "present", FAKE_TOOL)
        self.missing = root / "nowhere" / "chromium"
        self.venv_bin = root / "venv-bin"
        for tool in ("ruff", "python"):
            _script(self.venv_bin / tool, FAKE_TOOL)
        # `make test` needs its install stamp to be newer than pyproject.toml.
        (root / "pyproject.toml").touch()
        self.stamp = root / "installed"
        self.stamp.touch()
        os.utime(root / "pyproject.toml", (1_000_000_000, 1_000_000_000))

    def run(self, target: str, *, ci: str | None, chromium: Path, openssl: Path,
            apt_creates: Path | None = None) -> subprocess.CompletedProcess:  # fmt: skip
        env = {"PATH": os.environ.get("PATH", "/usr/bin:/bin"), "FAKE_LOG": str(self.log),
               "FAKE_APT_CREATES": str(apt_creates or "")}  # fmt: skip
        if ci is not None:
            env["CI"] = ci
        return subprocess.run(
            [MAKE, "--no-print-directory", "-f", str(self.makefile), target,
             f"CHROMIUM={chromium}", f"OPENSSL={openssl}", f"APT_GET={self.apt}",
             f"PG_INITDB={self.present}", f"JAVA={self.present}",
             f"BIN={self.venv_bin}", f"STAMP={self.stamp}"],
            cwd=self.root, env=env, capture_output=True, text=True, timeout=60,
        )  # fmt: skip

    def calls(self) -> list[str]:
        return self.log.read_text(encoding="utf-8").splitlines()


@pytest.fixture
def make(tmp_path: Path) -> Make:
    return Make(tmp_path)


def test_ci_make_test_stops_before_the_tests_when_chromium_cannot_be_installed(make):
    proc = make.run("test", ci="true", chromium=make.missing, openssl=make.present)
    assert proc.returncode != 0
    assert f"error: chromium ({make.missing}) is not installed" in proc.stderr
    assert "CI=true: its tests may not be skipped" in proc.stderr
    calls = make.calls()
    assert not [c for c in calls if c.startswith(("ruff", "python"))], "tests ran anyway"
    # As root apt was tried (and failed); otherwise it is not tried at all.
    assert calls == (["apt-get update -qq"] if AS_ROOT else [])


def test_outside_ci_make_test_warns_and_runs_the_tests(make):
    proc = make.run("test", ci=None, chromium=make.missing, openssl=make.present)
    assert proc.returncode == 0, proc.stderr
    assert f"warning: chromium ({make.missing}) is not installed" in proc.stdout
    calls = make.calls()
    assert any(c.startswith("ruff check") for c in calls)
    assert "python -m pytest -q -n 2 --dist loadfile" in calls


@pytest.mark.parametrize(
    ("target", "what", "packages"),
    [
        ("browser", "chromium", "chromium chromium-driver"),
        ("openssl", "the openssl CLI", "openssl"),
    ],
)
@pytest.mark.parametrize("ci", ["true", "1"])
def test_each_missing_program_fails_under_ci_and_only_warns_elsewhere(
    make, target, what, packages, ci
):
    missing = {"chromium": make.missing, "openssl": make.root / "nowhere" / "openssl"}
    if target == "openssl":
        missing["chromium"] = make.present
    strict = make.run(target, ci=ci, **missing)
    assert strict.returncode != 0
    assert strict.stderr.startswith(f"error: {what}")
    assert f"apt could not install it ({packages})" in strict.stderr
    for relaxed_ci in (None, "false"):
        relaxed = make.run(target, ci=relaxed_ci, **missing)
        assert relaxed.returncode == 0, relaxed.stderr
        assert relaxed.stdout.startswith(f"warning: {what}")


def test_a_program_apt_can_install_is_installed_even_under_ci(make):
    target = make.root / "installed-by-apt" / "chromium"
    target.parent.mkdir()
    proc = make.run("browser", ci="true", chromium=target, openssl=make.present,
                    apt_creates=target)  # fmt: skip
    if AS_ROOT:
        assert proc.returncode == 0, proc.stderr
        assert make.calls() == ["apt-get update -qq",
                                "apt-get install -y -qq chromium chromium-driver"]  # fmt: skip
        assert target.exists()
    else:  # not root: apt is not tried, so the program stays missing
        assert proc.returncode != 0 and make.calls() == []


def test_programs_already_there_need_nothing(make):
    proc = make.run("test", ci="true", chromium=make.present, openssl=make.present)
    assert proc.returncode == 0, proc.stderr
    assert not [c for c in make.calls() if c.startswith("apt-get")]
    assert "error" not in proc.stderr and "warning" not in proc.stdout
