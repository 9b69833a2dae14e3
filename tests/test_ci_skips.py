"""Under CI (CI=true) a skipped test fails the run: the hooks in tests/conftest.py turn
every kind of skip into a failure and leave expected failures alone.  Each case runs a
small test file in its own pytest session (pytester) with those hooks loaded."""

from __future__ import annotations

import conftest
import pytest

pytest_plugins = ["pytester"]

# One test of each kind of skip, one that passes and two expected failures.
SKIPPING_TESTS = """
import pytest


@pytest.fixture
def needs_tool():
    pytest.skip("tool missing (fixture)")


def test_passes():
    assert True


def test_skip_in_body():
    pytest.skip("widget missing (body)")


@pytest.mark.skipif(True, reason="widget missing (mark)")
def test_skipif():
    pass


def test_importorskip_in_body():
    pytest.importorskip("cuewatch_no_such_module_a")


def test_skip_in_fixture(needs_tool):
    pass


@pytest.mark.xfail(reason="known bug", strict=True)
def test_expected_failure():
    assert False


@pytest.mark.xfail(reason="sometimes fixed")
def test_unexpected_pass():
    pass
"""

MODULE_SKIP = """
import pytest

pytest.importorskip("cuewatch_no_such_module_b")


def test_never_collected():
    pass
"""


def _run(pytester: pytest.Pytester, source: str) -> pytest.RunResult:
    pytester.makepyfile(test_inner=source)
    return pytester.runpytest("-ra", "-p", "no:cacheprovider", plugins=[conftest])


def test_under_ci_every_skip_fails_with_its_reason(pytester, monkeypatch):
    monkeypatch.setenv("CI", "true")
    result = _run(pytester, SKIPPING_TESTS)
    # Skips in the test body fail the call; skips before it (skipif, a fixture) fail the
    # set-up, which pytest counts as errors.  Expected failures keep their outcome.
    result.assert_outcomes(passed=1, failed=2, errors=2, skipped=0, xfailed=1, xpassed=1)
    assert result.ret == pytest.ExitCode.TESTS_FAILED
    for reason in ("widget missing (body)", "widget missing (mark)", "tool missing (fixture)",
                   "cuewatch_no_such_module_a"):  # fmt: skip
        result.stdout.fnmatch_lines([f"*skipped under CI=true*{reason}*"])


@pytest.mark.parametrize("value", [None, "false", ""])
def test_outside_ci_a_skip_stays_a_skip(pytester, monkeypatch, value):
    if value is None:
        monkeypatch.delenv("CI", raising=False)
    else:
        monkeypatch.setenv("CI", value)
    result = _run(pytester, SKIPPING_TESTS)
    result.assert_outcomes(passed=1, skipped=4, xfailed=1, xpassed=1)
    assert result.ret == pytest.ExitCode.OK


def test_under_ci_a_module_skipped_at_import_fails_the_run(pytester, monkeypatch):
    monkeypatch.setenv("CI", "true")
    result = _run(pytester, MODULE_SKIP)
    result.assert_outcomes(errors=1)
    assert result.ret != pytest.ExitCode.OK
    result.stdout.fnmatch_lines(["*skipped under CI=true*cuewatch_no_such_module_b*"])
    monkeypatch.delenv("CI")
    result = _run(pytester, MODULE_SKIP)
    result.assert_outcomes(skipped=1)
