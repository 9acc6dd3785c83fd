"""A checkpoint written by release 0.1.0 still loads and resumes exactly.

``tests/fixtures/tower_checkpoint_0_1_0.pt.gz`` holds, per optimizer, a model and optimizer state
dict saved after 6 steps (``tests/fixtures/make_tower_checkpoint.py``, not to be regenerated). The
reference is torch.optim's checkpoint contract: loading it (``torch.load(weights_only=True)``)
into fresh objects and taking the next steps gives bit for bit what the same run gives without
the interruption. The checkpoint's 6 steps were taken on one CPU; where this CPU's float64
kernels round differently (the uninterrupted run's weights after 6 steps are not the saved ones
bit for bit), the resumed run is compared to 1e-9 relative instead: a wrong or dropped piece of
state moves it by far more than rounding.
"""

from __future__ import annotations

import gzip
import io
import sys
from pathlib import Path
from typing import Any

import pytest
import torch

FIXTURES = Path(__file__).resolve().parent / "fixtures"
sys.path.insert(0, str(FIXTURES))
from checkpoint_run import CONFIGS, STEPS_AFTER, STEPS_BEFORE, make, train  # noqa: E402


@pytest.fixture(scope="module")
def checkpoint() -> dict[str, Any]:
    raw = gzip.decompress((FIXTURES / "tower_checkpoint_0_1_0.pt.gz").read_bytes())
    return torch.load(io.BytesIO(raw), weights_only=True)  # type: ignore[no-any-return]


def test_the_fixture_is_the_0_1_0_release(checkpoint: dict[str, Any]) -> None:
    assert checkpoint["version"] == "0.1.0" and checkpoint["steps"] == STEPS_BEFORE
    assert set(checkpoint["entries"]) == set(CONFIGS)
    assert checkpoint["entries"]["sgd_momentum"]["retreats"] > 0  # retreat state is part of it


@pytest.mark.parametrize("name", list(CONFIGS))
def test_release_checkpoint_resumes_exactly_like_the_uninterrupted_run(checkpoint: dict[str, Any], name: str) -> None:
    entry = checkpoint["entries"][name]
    straight_model, straight = make(name)
    train(straight_model, straight, range(STEPS_BEFORE))
    same_cpu = all(torch.equal(v, entry["model"][k]) for k, v in straight_model.state_dict().items())
    train(straight_model, straight, range(STEPS_BEFORE, STEPS_BEFORE + STEPS_AFTER))
    same = torch.equal if same_cpu else _close

    model, opt = make(name)
    model.load_state_dict(entry["model"])
    opt.load_state_dict(entry["optimizer"])
    assert opt.retreats() == entry["retreats"]  # type: ignore[attr-defined]
    train(model, opt, range(STEPS_BEFORE, STEPS_BEFORE + STEPS_AFTER))

    for p, q in zip(model.parameters(), straight_model.parameters(), strict=True):
        assert same(p, q)
    got, want = opt.step_sizes(), straight.step_sizes()  # type: ignore[attr-defined]
    assert same(torch.tensor(got, dtype=torch.float64), torch.tensor(want, dtype=torch.float64))
    for p, q in zip(model.parameters(), straight_model.parameters(), strict=True):
        for key, value in straight.state[q].items():
            assert same(opt.state[p][key], value), key


def _close(a: torch.Tensor, b: torch.Tensor) -> bool:
    return bool(torch.allclose(a, b, rtol=1e-9, atol=1e-12, equal_nan=True))
