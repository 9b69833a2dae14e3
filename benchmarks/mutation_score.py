"""Summarise a mutation run (`make mutate`): the share of mutants killed per package and
the surviving mutants, read from the result files mutmut 3 leaves in mutants/.

A mutant counts as killed when a test failed on it or it ran past its time limit (the
usual convention: either way the suite noticed). Mutants no selected test reaches count
as not killed. Mutants not yet run (an interrupted run) are left out and counted apart.

    python -m benchmarks.mutation_score [--mutants DIR] [--survivors N]
"""

from __future__ import annotations

import argparse
import json
from collections import Counter
from pathlib import Path

# mutmut 3's exit codes per mutant (mutmut/stats.py: status_by_exit_code).
KILLED_CODES = {1, 3}
TIMEOUT_CODES = {36, -24, 24, 152, 255}
SURVIVED_CODES = {0}
NO_TESTS_CODES = {5, 33}
SKIPPED_CODES = {34}


def status(exit_code: int | None) -> str:
    """The summary class of one mutant's exit code."""
    if exit_code is None:
        return "not run"
    if exit_code in KILLED_CODES:
        return "killed"
    if exit_code in TIMEOUT_CODES:
        return "timeout"
    if exit_code in SURVIVED_CODES:
        return "survived"
    if exit_code in NO_TESTS_CODES:
        return "no tests"
    if exit_code in SKIPPED_CODES:
        return "skipped"
    return "suspicious"


def package_of(meta_path: Path, mutants_dir: Path) -> str:
    """'monitor/stats' for mutants/monitor/stats/lens.py.meta."""
    return meta_path.relative_to(mutants_dir).parent.as_posix()


def collect(mutants_dir: Path) -> dict[str, dict[str, str]]:
    """Mutant name -> status, per package directory."""
    by_package: dict[str, dict[str, str]] = {}
    for meta in sorted(mutants_dir.rglob("*.py.meta")):
        data = json.loads(meta.read_text(encoding="utf-8"))
        codes = data.get("exit_code_by_key", {})
        package = by_package.setdefault(package_of(meta, mutants_dir), {})
        package.update({name: status(code) for name, code in codes.items()})
    return by_package


def summary_rows(by_package: dict[str, dict[str, str]]) -> list[tuple[str, Counter, int, int]]:
    """(package, counts by status, killed incl. timeouts, mutants run) per package."""
    rows = []
    for package, statuses in sorted(by_package.items()):
        if not statuses:
            continue
        counts = Counter(statuses.values())
        run = sum(n for s, n in counts.items() if s not in ("not run", "skipped"))
        rows.append((package, counts, counts["killed"] + counts["timeout"], run))
    return rows


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--mutants", type=Path, default=Path("mutants"))
    parser.add_argument("--survivors", type=int, default=200, help="list at most N survivors")
    args = parser.parse_args(argv)
    by_package = collect(args.mutants)
    if not by_package:
        print(f"no mutation results under {args.mutants}/: run `make mutate` first")
        return 1
    print(f"{'package':<16} {'killed':>7} {'run':>6} {'share':>7}  survived  no-tests  not-run")
    for package, counts, killed, run in summary_rows(by_package):
        share = f"{100 * killed / run:6.1f}%" if run else "     -"
        print(
            f"{package:<16} {killed:>7} {run:>6} {share:>7}  {counts['survived']:>8}"
            f"  {counts['no tests']:>8}  {counts['not run']:>7}"
        )
    survivors = sorted(
        (name, s)
        for statuses in by_package.values()
        for name, s in statuses.items()
        if s in ("survived", "no tests", "suspicious")
    )
    print(f"\nsurvivors ({len(survivors)}; `mutmut show NAME` prints the change):")
    for name, s in survivors[: args.survivors]:
        print(f"  {s:<10} {name}")
    if len(survivors) > args.survivors:
        print(f"  ... and {len(survivors) - args.survivors} more (--survivors N)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
