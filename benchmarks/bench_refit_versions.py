"""Two versions of the refit side by side (`python -m benchmarks.bench_refit_versions`).

    python -m benchmarks.bench_refit_versions --before REV [--after REV] [--rows 5000000]
                                              [--rounds 3] [--keep DIR]

Checks ``--before`` (and ``--after``; default: this working tree) out as detached git
worktrees, builds one synthetic store with ``bench_refit.build_store`` and, per round and
version in turn, on a fresh copy of that store: a full refit, then the nightly refresh
after ``bench_refit.add_nightly`` (one new day plus late outcomes for 1% of history).
Each refit runs in a child process that first refitted a small store (warm: imports done,
compiled kernels loaded, as the long-running scheduler is); each version has its own
numba cache.  Alternating, so both versions see the same load; the best of the rounds
counts; a first round, not counted, fills each version's numba cache.  Prints wall and CPU seconds and the ratios; JSON to
``benchmarks/out/bench_refit_versions.json``.

Both versions must read the store the current code builds (the same schema version).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

from benchmarks.bench_refit import OUT, add_nightly, build_store

REPO = Path(__file__).resolve().parent.parent

# The child: a warm-up refit of the small store, then the timed one.
_CHILD = r"""
import json, sys, time
sys.path.insert(0, sys.argv[1])
from monitor.config import load_config
from monitor.refit.windows import refit
refit(load_config(sys.argv[4]), full=True)
config = load_config(sys.argv[2])
cpu, wall = time.process_time(), time.perf_counter()
summary = refit(config, full=sys.argv[3] == "full")
print(json.dumps({"seconds": time.perf_counter() - wall, "cpu_s": time.process_time() - cpu,
                  "windows": summary.windows_fitted, "buckets": summary.buckets_recomputed}))
"""


def _checkout(rev: str, into: Path) -> Path:
    subprocess.run(["git", "-C", str(REPO), "worktree", "add", "--detach", str(into), rev],
                   check=True, capture_output=True)  # fmt: skip
    return into


def _timed(code: Path, cache: Path, cfg: Path, mode: str, warm: Path) -> dict:
    env = {**os.environ, "PYTHONPATH": str(code), "NUMBA_CACHE_DIR": str(cache)}
    proc = subprocess.run(
        [sys.executable, "-c", _CHILD, str(code), str(cfg), mode, str(warm)],
        env=env, capture_output=True, text=True, cwd=code,
    )  # fmt: skip
    if proc.returncode:
        raise SystemExit(f"the refit of {code} failed:\n{proc.stderr[-3000:]}")
    return json.loads(proc.stdout.strip().splitlines()[-1])


def run(before: str, after: str | None, rows: int, rounds: int, workdir: Path) -> dict:
    makers, days = 200, 730
    codes = {"before": _checkout(before, workdir / "before")}
    codes["after"] = REPO if after is None else _checkout(after, workdir / "after")
    try:
        base = workdir / "store"
        base.mkdir()
        build_store(base, rows, days, makers)
        warm = workdir / "warm_up"
        warm.mkdir()
        build_store(warm, 20_000, 60, 5)
        runs: dict[str, dict[str, list]] = {v: {"full": [], "nightly": []} for v in codes}
        for round_no in range(rounds + 1):  # round 0 compiles the kernels: not counted
            for version, code in codes.items():
                copy = workdir / "copy"
                shutil.rmtree(copy, ignore_errors=True)
                shutil.copytree(base, copy)
                warm_copy = workdir / f"warm_{version}"
                if not warm_copy.exists():
                    shutil.copytree(warm, warm_copy)
                cache = workdir / f"numba_{version}"
                cfg = copy / "bench.toml"
                full = _timed(code, cache, cfg, "full", warm_copy / "bench.toml")
                add_nightly(cfg, rows, days, makers, 0.01)
                nightly = _timed(code, cache, cfg, "nightly", warm_copy / "bench.toml")
                print(version, "(not counted)" if not round_no else "",
                      {"full": round(full["seconds"], 2), "nightly": round(nightly["seconds"], 2)},
                      flush=True)  # fmt: skip
                if round_no:
                    runs[version]["full"].append(full)
                    runs[version]["nightly"].append(nightly)
    finally:
        for code in codes.values():
            if code != REPO:
                subprocess.run(["git", "-C", str(REPO), "worktree", "remove", "--force", str(code)],
                               capture_output=True)  # fmt: skip
    best = {v: {m: min(r, key=lambda x: x["seconds"]) for m, r in modes.items()}
            for v, modes in runs.items()}  # fmt: skip
    return {"before": before, "after": after or "working tree", "rows": rows, "rounds": rounds,
            "runs": runs, "best": best,
            "ratio": {m: best["before"][m]["seconds"] / best["after"][m]["seconds"]
                      for m in ("full", "nightly")}}  # fmt: skip


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--before", required=True, help="git revision to compare against")
    parser.add_argument("--after", help="git revision (default: this working tree)")
    parser.add_argument("--rows", type=int, default=5_000_000)
    parser.add_argument("--rounds", type=int, default=3)
    parser.add_argument("--keep", type=Path, help="work here and keep the stores")
    args = parser.parse_args(argv)
    workdir = args.keep or Path(tempfile.mkdtemp(prefix="cuewatch-versions-"))
    workdir.mkdir(parents=True, exist_ok=True)
    try:
        result = run(args.before, args.after, args.rows, args.rounds, workdir)
    finally:
        if args.keep is None:
            shutil.rmtree(workdir, ignore_errors=True)
    OUT.mkdir(parents=True, exist_ok=True)
    path = OUT / "bench_refit_versions.json"
    path.write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")
    for mode in ("full", "nightly"):
        b, a = result["best"]["before"][mode], result["best"]["after"][mode]
        print(f"{mode}: before {b['seconds']:.2f} s ({b['cpu_s']:.2f} s CPU), after "
              f"{a['seconds']:.2f} s ({a['cpu_s']:.2f} s CPU): {result['ratio'][mode]:.2f}x")  # fmt: skip
    print(f"(all figures: {path})")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
