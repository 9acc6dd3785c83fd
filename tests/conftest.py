"""Shared fixtures of the test suite."""

from __future__ import annotations

import pytest

from stepsize_tower.bases import native


@pytest.fixture
def reference_path(monkeypatch: pytest.MonkeyPatch) -> None:
    """TowerAdam on its reference path (torch's kernels, as on CUDA or without a C++ compiler).

    On the CPU the default step runs the native kernel, the same math up to rounding
    (compared with this path in ``test_native_kernel.py``). Tests that pin results bit for
    bit against ``torch.optim`` or against another path of ours, or that stand in for an
    accelerator, use this path.
    """
    monkeypatch.setattr(native, "available", lambda: False)
