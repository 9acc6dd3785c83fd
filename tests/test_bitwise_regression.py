"""Refactoring keeps results bit for bit: 40 steps of every configuration against a recording.

The scenarios (``tests/fixtures/make_regression.py``) cover every entry of the registry at
three typed learning rates (as given, 3000x: retreats and the growth guard, 1e-5x: the
levels must grow it), and the options the registry leaves out: ``horizon=0``,
``growth_search``, ``first_step_limit``, ``retreat=False``, ``sharded=True`` without a
process group, a tensor ``lr``, learned momentum with Nesterov, learned betas, ``maximize``,
and ``compiled=True`` (slow: it compiles). Each stream holds a skipped step (an infinite
gradient) and steps where one parameter has no gradient. Reference: the results recorded by
the code as it was before the restructuring (``torch.equal``; NaN matches NaN), one
recording per kind of CPU arithmetic (``make_regression.py``); on a CPU with none, the
comparisons skip and say how to add one.
"""

from __future__ import annotations

import gzip
import importlib.util
import io
from collections.abc import Iterator
from pathlib import Path
from types import ModuleType

import pytest
import torch
from torch import Tensor

from stepsize_tower.bases import compiled as _compiled


def _load_cases() -> ModuleType:
    path = Path(__file__).parent / "fixtures" / "make_regression.py"
    spec = importlib.util.spec_from_file_location("make_regression", path)
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


cases = _load_cases()
RECORDED = cases.load()
NO_RECORDING = (
    "no recording for this CPU's float arithmetic (torch.optim.SGD's probe run matches none of "
    "tests/fixtures/regression-*.pt.gz); on a checkout whose results are known good, add one with "
    "`PYTHONPATH=$PWD python tests/fixtures/make_regression.py --add`"
)


def _recorded() -> dict[str, dict[str, Tensor]]:
    if RECORDED is None:
        pytest.skip(NO_RECORDING)
    return RECORDED


def _same(a: Tensor, b: Tensor) -> bool:
    if a.dtype != b.dtype or a.shape != b.shape:
        return False
    if a.is_floating_point():
        nan = a.isnan()
        return torch.equal(nan, b.isnan()) and torch.equal(a[~nan], b[~nan])
    return torch.equal(a, b)


@pytest.fixture(autouse=True)
def _one_thread() -> Iterator[None]:
    """One thread: tiny tensors run faster so on a shared machine (results do not depend on it)."""
    threads = torch.get_num_threads()
    torch.set_num_threads(1)
    yield
    torch.set_num_threads(threads)


def _check(scenario: str) -> None:
    want = _recorded()[scenario]
    got = cases.run(scenario)
    assert sorted(got) == sorted(want), f"{scenario}: the state_dict's tensors changed"
    differ = [k for k in want if not _same(got[k], want[k])]
    assert not differ, f"{scenario}: not bitwise equal: {differ}"


@pytest.mark.parametrize("scenario", cases.scenario_names(compiled=False))
def test_results_bitwise_equal_to_recording(scenario: str) -> None:
    _check(scenario)


@pytest.mark.slow
@pytest.mark.parametrize("scenario", cases.scenario_names(compiled=True))
def test_compiled_results_bitwise_equal_to_recording(scenario: str) -> None:
    if not _compiled.available():
        pytest.skip("torch.compile (inductor with a C++ compiler) is not available here")
    _check(scenario)


def test_scenarios_exercise_retreats_skips_and_growth() -> None:
    """The recording covers what it claims: retreats at the large lr, skipped steps, a searched start."""

    recorded = _recorded()

    def counter(scenario: str, key: str) -> float:
        return sum(float(v) for k, v in recorded[scenario].items() if k.endswith(f"/tower/{key}"))

    for scenario in (
        "sgd@large",
        "adamw_first_step_limit_2@large",
        "adam_no_first_step_limit@large",
        "sgd_tensor@large",
    ):
        assert counter(scenario, "retreats") > 0, scenario
    assert counter("adam", "skipped") == 1  # the infinite gradient's step, in the first group
    searched = recorded["sgd_growth_search@small"]["param_groups/0/tower/search"]
    assert float(searched.reshape(-1)[0]) != 0


def test_each_recording_is_named_after_its_plain_sgd_run() -> None:
    # load() picks a recording by the hash of torch.optim.SGD's run: that run must be the
    # recording's own sgd_depth0 weights, or a recording would never (or wrongly) be picked.
    paths = sorted(cases.HERE.glob(cases.PATTERN))
    assert paths, "no recording at all"
    for path in paths:
        with gzip.open(path, "rb") as f:
            packed = torch.load(io.BytesIO(f.read()), weights_only=True)
        weights = {k: v for k, v in cases.unpack(packed["sgd_depth0"]).items() if k.startswith("weight/")}
        assert cases.recording_path(cases.probe_key(weights)) == path


def test_the_probe_is_the_depth0_scenario_run_here() -> None:
    weights = cases.probe()
    got = cases.run("sgd_depth0")
    assert all(torch.equal(weights[k], got[k]) for k in weights)
