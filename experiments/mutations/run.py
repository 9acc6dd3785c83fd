"""Apply each mutation of :mod:`mutations` to a temporary copy of the package and run its tests.

Usage (from the repository root)::

    python experiments/mutations/run.py                 # every fast mutation
    python experiments/mutations/run.py --slow          # also those that need the distributed tests
    python experiments/mutations/run.py --only NAME ... # some of them
    python experiments/mutations/run.py --baseline      # first check each test selection passes unmutated
    python experiments/mutations/run.py --list

The repository's files are never touched: ``stepsize_tower/`` is copied into a temporary
folder, mutated there, and pytest runs with that folder as its working directory (so it is
first on ``sys.path``) and the repository's ``pyproject.toml`` as its configuration. A mutation
is "caught" when its tests fail, "survived" when they pass; a snippet that no longer matches
is reported as "snippet not found" (update the table in ``mutations.py``).
"""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
from mutations import MUTATIONS, Mutation

ROOT = Path(__file__).resolve().parents[2]
PACKAGE = ROOT / "stepsize_tower"
TIMEOUT_S = 900


def _apply(mutation: Mutation, package: Path) -> str | None:
    """Edit the copy in place; return an error message instead when a snippet does not match once."""
    path = package / mutation.file
    if not path.is_file():
        return f"file not found: stepsize_tower/{mutation.file}"
    text = path.read_text()
    for old, new in mutation.edits:
        count = text.count(old)
        if count != 1:
            where = "not found" if count == 0 else f"found {count} times"
            return f"snippet {where} in stepsize_tower/{mutation.file}: {old!r}"
        text = text.replace(old, new)
    path.write_text(text)
    return None


def _pytest(tests: tuple[str, ...], workdir: Path) -> tuple[int, str, float]:
    args = [str(ROOT / t) if t.startswith("tests/") else t for t in tests]
    cmd = [sys.executable, "-m", "pytest", "-x", "-q", "-p", "no:cacheprovider", "-c", str(ROOT / "pyproject.toml")]
    cmd += ["--rootdir", str(ROOT), "-m", "", *args]
    env = {**os.environ, "PYTHONPATH": str(workdir), "OMP_NUM_THREADS": "1"}
    start = time.monotonic()
    try:
        done = subprocess.run(cmd, cwd=workdir, env=env, capture_output=True, text=True, timeout=TIMEOUT_S)
    except subprocess.TimeoutExpired:
        return -1, f"no result after {TIMEOUT_S} s", time.monotonic() - start
    lines = [ln for ln in done.stdout.splitlines() if ln.strip()]
    return done.returncode, (lines[-1] if lines else done.stderr.strip()[-300:]), time.monotonic() - start


def _check_import(workdir: Path) -> None:
    """The copy, not the repository's package (nor an installed one), must be what the tests import."""
    code = "import stepsize_tower, sys; sys.stdout.write(stepsize_tower.__file__)"
    env = {**os.environ, "PYTHONPATH": str(workdir)}
    got = subprocess.run([sys.executable, "-c", code], cwd=workdir, env=env, capture_output=True, text=True).stdout
    if not Path(got).resolve().is_relative_to(workdir.resolve()):
        raise SystemExit(f"the tests would import {got!r}, not the mutated copy in {workdir}")


def run_one(mutation: Mutation, baseline: bool) -> dict[str, object]:
    with tempfile.TemporaryDirectory(prefix="mutant_") as tmp:
        workdir = Path(tmp)
        shutil.copytree(PACKAGE, workdir / "stepsize_tower", ignore=shutil.ignore_patterns("__pycache__"))
        _check_import(workdir)
        result: dict[str, object] = {"name": mutation.name, "tests": " ".join(mutation.tests)}
        if baseline:
            rc, last, _ = _pytest(mutation.tests, workdir)
            if rc != 0:
                result.update(outcome="baseline fails", detail=last)
                return result
        error = _apply(mutation, workdir / "stepsize_tower")
        if error:
            result.update(outcome="snippet not found", detail=error)
            return result
        rc, last, seconds = _pytest(mutation.tests, workdir)
        outcome = {0: "SURVIVED", 1: "caught", -1: "timeout"}.get(rc, f"error (pytest exit {rc})")
        result.update(outcome=outcome, detail=last, seconds=round(seconds, 1))
        return result


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--only", nargs="+", metavar="NAME", help="run only these mutations")
    parser.add_argument("--slow", action="store_true", help="include mutations marked slow (distributed)")
    parser.add_argument("--baseline", action="store_true", help="check each test selection passes unmutated first")
    parser.add_argument("--list", action="store_true", help="list the mutations and exit")
    parser.add_argument("--json", type=Path, help="also write the results to this JSON file")
    args = parser.parse_args()
    chosen = [
        m for m in MUTATIONS if (args.only is None or m.name in args.only) and (args.slow or args.only or not m.slow)
    ]
    unknown = set(args.only or ()) - {m.name for m in MUTATIONS}
    if unknown:
        parser.error(f"unknown mutation(s) {sorted(unknown)}; see --list")
    if args.list:
        for m in MUTATIONS:
            print(f"{m.name:52s} stepsize_tower/{m.file:22s} {' '.join(m.tests)}{'  [slow]' if m.slow else ''}")
        return 0
    results = []
    for m in chosen:
        r = run_one(m, args.baseline)
        results.append(r)
        print(f"{r['outcome']:18s} {m.name:52s} {r.get('seconds', '')!s:>6}  {r['detail']}", flush=True)
    caught = sum(r["outcome"] == "caught" for r in results)
    print(f"\n{caught}/{len(results)} caught")
    if args.json:
        args.json.parent.mkdir(parents=True, exist_ok=True)
        args.json.write_text(json.dumps(results, indent=2))
    return 0 if caught == len(results) else 1


if __name__ == "__main__":
    sys.exit(main())
