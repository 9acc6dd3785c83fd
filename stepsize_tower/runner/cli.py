"""The ``stepsize-tower`` command: run, report, dashboard, check and list.

Exit status: 0 success; 1 some trials failed (run again to retry them) or TensorBoard did
not start; 2 a malformed recipe or bad arguments (nothing is written); 130 interrupted.
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import shlex
import subprocess
import sys
from collections.abc import Sequence
from pathlib import Path

from .errors import RecipeError

__all__ = ["bundled_recipes", "main", "resolve_recipe_path"]

EXIT_FAILED_TRIALS = 1
EXIT_RECIPE = 2
EXIT_INTERRUPTED = 130
#: ``--executor`` choices (the same as ``resources.executor``; kept here so ``--help`` imports no torch).
EXECUTOR_NAMES = ("local", "dask")


def bundled_recipes() -> dict[str, Path]:
    """The recipes shipped in the repository's ``recipes/`` folder, by name."""
    folder = Path(__file__).resolve().parents[2] / "recipes"
    return {p.stem: p for p in sorted(folder.glob("*.yaml"))} if folder.is_dir() else {}


def resolve_recipe_path(arg: str) -> Path:
    """``arg`` itself when it is a file, else the bundled recipe of that name."""
    p = Path(arg)
    if p.exists() or p.suffix in (".yaml", ".yml"):
        return p
    bundled = bundled_recipes()
    return bundled.get(arg, p)


def _load(args: argparse.Namespace):  # type: ignore[no-untyped-def]
    from .checks import check_recipe
    from .schema import load_recipe

    loaded = load_recipe(resolve_recipe_path(args.recipe), [*(args.set or ()), *_executor_overrides(args)])
    check_recipe(loaded)
    return loaded


def _executor_overrides(args: argparse.Namespace) -> list[str]:
    """``--executor`` and ``--address`` as overrides of ``resources`` (checked like the recipe's own keys)."""
    overrides = []
    for flag in ("executor", "address"):
        value = getattr(args, flag, None)
        if value is not None:
            overrides.append(f"resources.{flag}={json.dumps(value)}")  # quoted: YAML reads it as a string
    return overrides


def _cmd_check(args: argparse.Namespace) -> int:
    from .trials import expand_trials

    loaded = _load(args)
    trials = expand_trials(loaded.recipe)
    configs = ", ".join(o.label for o in loaded.recipe.optimizers)
    print(f"{loaded.source}: OK — {len(trials)} trials ({configs}); nothing was run")
    return 0


def _cmd_run(args: argparse.Namespace) -> int:
    from .report import write_report
    from .sweep import default_out, run_sweep

    if args.workers is not None and args.workers < 1:
        raise RecipeError(f"expected --workers >= 1, got {args.workers}", source="--workers")
    loaded = _load(args)
    out = Path(args.out) if args.out else default_out(loaded)
    try:
        summary = run_sweep(loaded, out, workers=args.workers)
    except KeyboardInterrupt:
        print(
            f"\nInterrupted: finished trials are saved in {out}; run the same command again to resume.", file=sys.stderr
        )
        return EXIT_INTERRUPTED
    if not args.no_report:
        paths = write_report(out)
        print(f"Report: {paths[1]}")
    print(f"Results: {out / 'results.jsonl'}; TensorBoard: stepsize-tower dashboard {shlex.quote(str(out))}")
    if summary.failed:
        print(
            f"{summary.failed} trial(s) failed (tracebacks in results.jsonl); run the same command again to "
            "retry them.",
            file=sys.stderr,
        )
        return EXIT_FAILED_TRIALS
    return 0


def _sweep_folder(arg: str) -> Path:
    folder = Path(arg)
    if not (folder / "recipe.yaml").is_file():
        raise RecipeError(
            f"{folder} is not a sweep folder (no recipe.yaml); give the --out folder of a run", source=str(folder)
        )
    return folder


def _cmd_report(args: argparse.Namespace) -> int:
    from .report import write_report

    for path in write_report(_sweep_folder(args.folder)):
        print(path)
    return 0


def dashboard_command(folder: Path, port: int) -> list[str]:
    """The TensorBoard command for a sweep folder."""
    from .sweep import TB_FOLDER

    return [sys.executable, "-m", "tensorboard.main", "--logdir", str(folder / TB_FOLDER), "--port", str(port)]


def _cmd_dashboard(args: argparse.Namespace) -> int:
    folder = _sweep_folder(args.folder)
    cmd = dashboard_command(folder, args.port)
    text = " ".join(shlex.quote(c) for c in cmd)
    if args.print_only:
        print(text)
        return 0
    if importlib.util.find_spec("tensorboard") is None:
        print(f"TensorBoard is not installed (pip install tensorboard); then run:\n  {text}", file=sys.stderr)
        return EXIT_FAILED_TRIALS
    print(f"Starting TensorBoard on http://localhost:{args.port} (Ctrl-C stops it):\n  {text}")
    try:
        code = subprocess.call(cmd)
    except OSError as exc:
        code = -1
        print(f"could not start it: {exc}", file=sys.stderr)
    except KeyboardInterrupt:
        return 0
    if code != 0:
        print(f"TensorBoard did not start (status {code}); run it yourself:\n  {text}", file=sys.stderr)
        return EXIT_FAILED_TRIALS
    return 0


def _cmd_list(args: argparse.Namespace) -> int:
    from ..tasks import TASKS
    from ..tasks.compose import DATASETS, MODELS

    print("Bundled recipes (stepsize-tower run NAME):")
    for name, path in bundled_recipes().items():
        first = next((ln for ln in path.read_text().splitlines() if ln.startswith("description:")), "")
        print(f"  {name:<18} {first.removeprefix('description:').strip()}")
    print("Built-in tasks (task.builtin):")
    for spec in TASKS.values():
        print(f"  {spec.name:<18} {spec.description}")
    print("Datasets (task.dataset, with task.model):")
    for d in DATASETS.values():
        print(f"  {d.name:<18} {d.description}")
    print("Models (task.model):")
    for m, desc in MODELS.items():
        print(f"  {m:<18} {desc}")
    print("Your own task: task.user: package.module:function (see stepsize_tower/runner/user_task.py)")
    return 0


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="stepsize-tower",
        description="Sweep step-size towers against fixed-rate optimizers from a YAML recipe.",
    )
    sub = parser.add_subparsers(dest="command", required=True)
    sets = {"action": "append", "metavar": "KEY=VALUE", "help": "override a recipe key (dotted; YAML value)"}

    p = sub.add_parser("run", help="run (or resume) a sweep")
    p.add_argument("recipe", help="a recipe file, or the name of a bundled recipe")
    p.add_argument("--out", help="sweep folder (default: runs/<recipe name>)")
    p.add_argument(
        "--workers",
        type=int,
        help="local worker processes (default: the recipe's, else one per core); with dask, trials in flight at once",
    )
    p.add_argument(
        "--executor",
        choices=EXECUTOR_NAMES,
        help="where trials run: local processes (default) or a Dask cluster (overrides resources.executor)",
    )
    p.add_argument(
        "--address", metavar="URL", help="the Dask scheduler, such as tcp://10.0.0.5:8786 (overrides resources.address)"
    )
    p.add_argument("--set", **sets)  # type: ignore[arg-type]
    p.add_argument("--no-report", action="store_true", help="do not write the report at the end")
    p.set_defaults(func=_cmd_run)

    p = sub.add_parser("check", help="validate a recipe without running it")
    p.add_argument("recipe")
    p.add_argument("--set", **sets)  # type: ignore[arg-type]
    p.set_defaults(func=_cmd_check)

    p = sub.add_parser("report", help="write the Markdown/HTML report of a sweep folder")
    p.add_argument("folder")
    p.set_defaults(func=_cmd_report)

    p = sub.add_parser("dashboard", help="start TensorBoard on a sweep folder")
    p.add_argument("folder")
    p.add_argument("--port", type=int, default=6006)
    p.add_argument("--print-only", action="store_true", help="print the command instead of running it")
    p.set_defaults(func=_cmd_dashboard)

    p = sub.add_parser("list", help="show the bundled recipes, tasks, datasets and models")
    p.set_defaults(func=_cmd_list)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of ``stepsize-tower``; returns the exit status."""
    parser = _parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:  # argparse exits 2 on bad arguments already
        return int(exc.code or 0)
    try:
        return int(args.func(args))
    except RecipeError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return EXIT_RECIPE


if __name__ == "__main__":
    sys.exit(main())
