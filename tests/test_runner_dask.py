"""The Dask executor runs the same trials into the same records as the local one, resumes the same
way, and reports failed trials and lost workers; the local executor stays the default. The cluster
is a loopback-only LocalCluster started by the tests (the Dask tests skip without the extra)."""

from __future__ import annotations

import json
import logging
import os
import sys
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest

from stepsize_tower.runner import ResultStore, check_recipe, expand_trials, parse_recipe, run_sweep
from stepsize_tower.runner.cli import EXECUTOR_NAMES, main
from stepsize_tower.runner.executors import EXECUTORS, LocalExecutor, executor_for
from stepsize_tower.runner.sweep import jobs_for

USER_MODULE = """
import os

import torch
from torch import nn


def build(seed, rows=96, crash_seed=-1):
    if seed == 2:
        raise RuntimeError("seed 2 is broken on purpose")
    if seed == crash_seed:
        os._exit(3)  # the whole worker process dies, as when it is killed
    gen = torch.Generator().manual_seed(seed)
    x = torch.randn(rows, 3, generator=gen)
    y = x @ torch.tensor([1.0, -2.0, 0.5]) + 0.1 * torch.randn(rows, generator=gen)
    threads = {"torch_threads": lambda model: float(torch.get_num_threads())}
    return {"model": nn.Linear(3, 1), "train": (x, y), "test": (x[:32], y[:32]), "loss": "mse", "metrics": threads}
"""

RECIPE = """\
name: tiny_dask
task: {user: tiny_task:build, steps: 12, batch_size: 16, metrics: [torch_threads]}
optimizers:
  - {name: tower-sgd, kind: tower, base: sgd}
  - {name: sgd, kind: fixed, base: SGD}
sweep: {lr: [0.05], seeds: [0, 1, 2]}
resources: {threads: 2, log_every: 4}
"""
TOTAL = 2 * 1 * 3
BROKEN_SEED = 2

# What differs between two runs of the same trial: clocks, the worker's pid and the folder.
VOLATILE = {"setup_seconds", "wall_seconds", "train_seconds", "finished_at", "pid", "log_dir"}


def _records(out: Path) -> list[dict[str, Any]]:
    path = out / "results.jsonl"
    return [json.loads(line) for line in path.read_text().splitlines()] if path.exists() else []


def _stable(record: dict[str, Any]) -> dict[str, Any]:
    return {k: v for k, v in record.items() if k not in VOLATILE}


def _recipe(folder: Path, text: str = RECIPE) -> Path:
    (folder / "tiny_task.py").write_text(USER_MODULE)  # found next to the recipe, by the workers too
    recipe = folder / "tiny.yaml"
    recipe.write_text(text)
    return recipe


@pytest.fixture(scope="module")
def cluster() -> Iterator[Any]:
    """Two single-threaded worker processes on 127.0.0.1; a trial is failed as soon as its worker dies."""
    distributed = pytest.importorskip("distributed")
    import dask

    with dask.config.set({"distributed.scheduler.allowed-failures": 0}):
        local = distributed.LocalCluster(
            n_workers=2,
            threads_per_worker=1,
            processes=True,
            host="127.0.0.1",
            dashboard_address=None,
            silence_logs=logging.ERROR,
        )
    with local:
        yield local


@pytest.fixture(scope="module")
def both(cluster: Any, tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """The tiny recipe run by the local executor and, through the command line, on the cluster."""
    root = tmp_path_factory.mktemp("both")
    recipe = _recipe(root)
    local, on_dask = root / "local", root / "dask"
    local_status = main(["run", str(recipe), "--out", str(local), "--workers", "2", "--no-report"])
    address = cluster.scheduler_address
    args = ["run", str(recipe), "--out", str(on_dask), "--executor", "dask", "--address", address, "--no-report"]
    dask_status = main(args)
    return {
        "root": root,
        "recipe": recipe,
        "local": _records(local),
        "dask": _records(on_dask),
        "statuses": (local_status, dask_status),
        "out": on_dask,
    }


def test_dask_executor_writes_the_same_records_as_local_processes(both: dict[str, Any]) -> None:
    local, on_dask = both["local"], both["dask"]
    assert both["statuses"] == (1, 1)  # the broken seed fails on both
    assert len(local) == len(on_dask) == TOTAL
    by_id = {r["trial_id"]: r for r in local}
    assert {r["trial_id"] for r in on_dask} == set(by_id)
    for record in on_dask:
        # seeded trials: every metric, step size and trajectory point is bit-identical
        assert _stable(record) == _stable(by_id[record["trial_id"]])
    ok = [r for r in on_dask if r["status"] == "ok"]
    assert len(ok) == TOTAL - 2 and all(r["metrics"]["train_loss"] is not None for r in ok)
    # every trial wrote its TensorBoard run where the record says
    assert all(Path(r["log_dir"]).is_dir() for r in ok)


def test_failing_trial_on_dask_is_a_failed_record_with_its_traceback(both: dict[str, Any]) -> None:
    failed = [r for r in both["dask"] if r["status"] == "failed"]
    assert len(failed) == 2 and {r["trial"]["seed"] for r in failed} == {BROKEN_SEED}
    for r in failed:
        assert r["error"].startswith("Traceback") and "seed 2 is broken on purpose" in r["error"]
        assert "tiny_task.py" in r["error"]


def test_threads_per_trial_are_honoured_inside_dask_workers(both: dict[str, Any]) -> None:
    ok = [r for r in both["dask"] if r["status"] == "ok"]
    assert {r["metrics"]["torch_threads"] for r in ok} == {2.0}  # resources.threads, not Dask's 1


def test_command_line_flags_are_saved_in_the_resolved_recipe(both: dict[str, Any], cluster: Any) -> None:
    resolved = parse_recipe((both["out"] / "recipe.yaml").read_text(), "recipe.yaml").recipe
    assert resolved.resources.executor == "dask"
    assert resolved.resources.address == cluster.scheduler_address


def test_resume_on_dask_runs_only_the_missing_trials(
    both: dict[str, Any], cluster: Any, capsys: pytest.CaptureFixture[str]
) -> None:
    out = both["root"] / "resumed"
    out.mkdir()
    # two finished trials (written by the local executor) and one failed one are already there
    local = both["local"]
    kept = [r for r in local if r["status"] == "ok"][:2] + [r for r in local if r["status"] == "failed"][:1]
    (out / "results.jsonl").write_text("".join(json.dumps(r) + "\n" for r in kept))
    args = ["run", str(both["recipe"]), "--out", str(out), "--no-report", "--set"]
    assert main([*args, f"resources.address={cluster.scheduler_address}", "--executor", "dask"]) == 1
    assert "6 trials, 2 already done, 4 to run on the Dask cluster" in capsys.readouterr().err
    after = _records(out)
    assert after[:3] == kept  # nothing written before is touched
    new_ids = [r["trial_id"] for r in after[3:]]
    assert sorted(new_ids) == sorted({r["trial_id"] for r in local} - {r["trial_id"] for r in kept[:2]})
    by_id = {r["trial_id"]: r for r in local}
    assert all(_stable(r) == _stable(by_id[r["trial_id"]]) for r in after[3:])


def test_ctrl_c_on_dask_keeps_finished_records_and_cancels_the_rest(both: dict[str, Any], cluster: Any) -> None:
    from stepsize_tower.runner.dask_backend import DaskExecutor

    loaded = parse_recipe(RECIPE.replace("[0, 1, 2]", "[0, 1]"), "tiny.yaml", folder=str(both["root"]))
    trials = expand_trials(loaded.recipe)
    jobs = jobs_for(loaded, both["root"] / "interrupted", trials)
    seen: list[dict[str, Any]] = []

    def interrupt_after_first(record: dict[str, Any]) -> None:
        seen.append(record)
        raise KeyboardInterrupt

    executor = DaskExecutor(cluster.scheduler_address, max_in_flight=2)
    with pytest.raises(KeyboardInterrupt), executor:
        executor.run(jobs, interrupt_after_first)
    assert len(seen) == 1 and seen[0]["status"] == "ok"
    assert executor.client is None  # the connection is closed
    deadline = time.monotonic() + 10
    while cluster.scheduler.tasks and time.monotonic() < deadline:  # cancelled trials leave the scheduler
        time.sleep(0.05)
    assert not cluster.scheduler.tasks


def test_each_sweep_imports_its_own_user_module_on_long_lived_workers(cluster: Any, tmp_path: Path) -> None:
    from stepsize_tower.runner.dask_backend import DaskExecutor

    marks = []
    for version in (1.0, 2.0):  # two recipes, each with its own tiny_task.py, on the same workers
        folder = tmp_path / f"v{version:g}"
        folder.mkdir()
        module = USER_MODULE.replace('"torch_threads"', f'"version": lambda model: {version}, "torch_threads"')
        (folder / "tiny_task.py").write_text(module)
        text = RECIPE.replace("[0, 1, 2]", "[0, 1]").replace("[torch_threads]", "[version]")  # one per worker
        loaded = parse_recipe(
            text.replace("  - {name: sgd, kind: fixed, base: SGD}\n", ""), "v.yaml", folder=str(folder)
        )
        with open(folder / "progress.txt", "w") as stream:
            run_sweep(loaded, folder / "out", stream=stream, executor=DaskExecutor(cluster.scheduler_address))
        marks += [r["metrics"]["version"] for r in _records(folder / "out")]
    assert marks == [1.0, 1.0, 2.0, 2.0]


def test_unreachable_scheduler_is_a_clear_error_and_writes_nothing(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    pytest.importorskip("distributed")
    from stepsize_tower.runner import dask_backend

    monkeypatch.setattr(dask_backend, "CONNECT_TIMEOUT", 0.5)
    recipe = _recipe(tmp_path)
    out = tmp_path / "out"
    args = ["run", str(recipe), "--out", str(out), "--executor", "dask", "--address", "tcp://127.0.0.1:9"]
    assert main(args) == 2
    err = capsys.readouterr().err
    assert "resources.address" in err and "cannot reach the Dask scheduler at 'tcp://127.0.0.1:9'" in err
    assert "dask scheduler" in err
    assert not out.exists()


def test_lost_worker_becomes_a_failed_record_and_is_retried_next_run(cluster: Any, tmp_path: Path) -> None:
    from stepsize_tower.runner.dask_backend import DaskExecutor

    recipe = RECIPE.replace("[0, 1, 2]", "[0]").replace("metrics: [torch_threads]", "options: {crash_seed: 0}")
    recipe = recipe.replace("  - {name: sgd, kind: fixed, base: SGD}\n", "")
    (tmp_path / "tiny_task.py").write_text(USER_MODULE)
    loaded = parse_recipe(recipe, "crash.yaml", folder=str(tmp_path))  # not checked: the check would crash here
    out = tmp_path / "out"
    with open(tmp_path / "progress.txt", "w") as stream:
        summary = run_sweep(loaded, out, stream=stream, executor=DaskExecutor(cluster.scheduler_address))
    assert (summary.ok, summary.failed) == (0, 1)
    [record] = _records(out)
    assert record["status"] == "failed" and record["trial"]["seed"] == 0
    assert "the Dask worker running this trial stopped" in record["error"] and "KilledWorker" in record["error"]
    assert ResultStore(out).done_ids() == set()  # not done: the next run retries it


# ---------------------------------------------------------------------------- no Dask needed

LOCAL = RECIPE.replace("resources: {threads: 2, log_every: 4}", "resources: {log_every: 4}")


def test_local_processes_stay_the_default(tmp_path: Path) -> None:
    _recipe(tmp_path, LOCAL)
    loaded = parse_recipe(LOCAL, "tiny.yaml", folder=str(tmp_path))
    check_recipe(loaded)
    res = loaded.recipe.resources
    assert (res.executor, res.address, res.workers) == ("local", None, None)
    executor = executor_for(loaded, todo=TOTAL)
    assert isinstance(executor, LocalExecutor)
    assert executor.workers == max(1, min(TOTAL, os.cpu_count() or 1))
    assert isinstance(executor_for(loaded, todo=TOTAL, workers=3), LocalExecutor)
    # where the trials run is not part of what they are: the same ids on any executor
    on_dask = parse_recipe(LOCAL, "x", ["resources.executor=dask", "resources.address=tcp://10.0.0.5:8786"])
    assert [t.trial_id for t in expand_trials(on_dask.recipe)] == [t.trial_id for t in expand_trials(loaded.recipe)]
    assert EXECUTOR_NAMES == EXECUTORS == ("local", "dask")


@pytest.mark.parametrize(
    ("case", "edit", "words"),
    [
        (
            "misspelled executor",
            ("log_every: 4}", "log_every: 4, executor: dsak}"),
            ["tiny.yaml:7", "resources.executor", "expected one of 'local', 'dask'", "did you mean 'dask'"],
        ),
        (
            "dask without an address",
            ("log_every: 4}", "log_every: 4, executor: dask}"),
            ["resources.executor", "needs the address of a running Dask scheduler", "--address", "dask scheduler"],
        ),
        (
            "an address for local processes",
            ("log_every: 4}", "log_every: 4, address: 'tcp://10.0.0.5:8786'}"),
            ["resources.address", "executor 'dask'", "runs on 'local'"],
        ),
        (
            "an address with spaces",
            ("log_every: 4}", "log_every: 4, executor: dask, address: 'tcp://host 8786'}"),
            ["resources.address", "expected a scheduler address such as tcp://"],
        ),
    ],
)
def test_bad_executor_settings_exit_2_and_say_what_to_fix(
    case: str, edit: tuple[str, str], words: list[str], tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    recipe = _recipe(tmp_path, LOCAL.replace(*edit))
    out = tmp_path / "out"
    assert main(["run", str(recipe), "--out", str(out)]) == 2
    err = capsys.readouterr().err
    for word in words:
        assert word in err, f"{case}: {word!r} missing from {err!r}"
    assert not out.exists()


def test_bad_executor_flag_lists_the_valid_ones(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    recipe = _recipe(tmp_path, LOCAL)
    assert main(["run", str(recipe), "--out", str(tmp_path / "out"), "--executor", "dsak"]) == 2
    err = capsys.readouterr().err
    assert "--executor" in err and "'dsak'" in err and "'local', 'dask'" in err


def test_dask_recipe_without_the_extra_names_the_extra(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.setitem(sys.modules, "distributed", None)  # import distributed now fails, as when not installed
    recipe = _recipe(tmp_path, LOCAL)
    args = ["check", str(recipe), "--set", "resources.executor=dask", "--set", "resources.address=tcp://10.0.0.5:8786"]
    assert main(args) == 2
    err = capsys.readouterr().err
    assert "resources.executor" in err and "pip install 'stepsize-tower[dask]'" in err
