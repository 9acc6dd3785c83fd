"""PyTorch Lightning and the Hugging Face Trainer drive a tower and log the step size in use (optional extras)."""

from __future__ import annotations

import csv
import math

import pytest
import torch
from torch import nn

import stepsize_tower
from stepsize_tower.integrations.hf import EffectiveLRScheduler
from stepsize_tower.tower import EFFECTIVE_LR_KEY


class _Regression(torch.utils.data.Dataset):
    def __init__(self, n: int = 64) -> None:
        gen = torch.Generator().manual_seed(0)
        self.x = torch.randn(n, 4, generator=gen)
        self.y = self.x.sum(dim=1, keepdim=True)

    def __len__(self) -> int:
        return len(self.x)

    def __getitem__(self, i: int) -> dict[str, torch.Tensor]:
        return {"inputs": self.x[i], "labels": self.y[i]}


class _LossModel(nn.Module):
    """A tiny model defined here that returns its loss, as Hugging Face models do (nothing downloaded)."""

    def __init__(self) -> None:
        super().__init__()
        self.net = nn.Sequential(nn.Linear(4, 8), nn.Tanh(), nn.Linear(8, 1))

    def forward(self, inputs: torch.Tensor, labels: torch.Tensor) -> dict[str, torch.Tensor]:
        return {"loss": nn.functional.mse_loss(self.net(inputs), labels)}


def test_hf_trainer_logs_the_effective_learning_rate(tmp_path) -> None:
    transformers = pytest.importorskip("transformers")
    pytest.importorskip("accelerate")
    torch.manual_seed(0)
    model = _LossModel()
    before = [p.detach().clone() for p in model.parameters()]
    opt = stepsize_tower.TowerAdamW(model.parameters(), lr=1e-3)
    sched = transformers.get_linear_schedule_with_warmup(opt, num_warmup_steps=2, num_training_steps=10)
    args = transformers.TrainingArguments(
        output_dir=str(tmp_path),
        max_steps=10,
        per_device_train_batch_size=8,
        logging_steps=1,
        report_to=[],
        save_strategy="no",
        use_cpu=True,
        disable_tqdm=True,
    )
    trainer = transformers.Trainer(
        model=model, args=args, train_dataset=_Regression(), optimizers=(opt, EffectiveLRScheduler(sched))
    )
    trainer.train()
    logged = [h["learning_rate"] for h in trainer.state.log_history if "learning_rate" in h]
    assert len(logged) == 10
    group = opt.param_groups[0]
    assert int(group["tower"]["step"]) == 10  # the Trainer called our step() every step
    # the last logged value is the step size the last step used, not the schedule's factor
    assert logged[-1] == pytest.approx(float(group[EFFECTIVE_LR_KEY]), rel=1e-6)
    assert logged[-1] != pytest.approx(group["lr"], rel=1e-3)  # group["lr"] is only the schedule's factor
    # reference: get_linear_schedule_with_warmup starts at factor 0, so the first step used 0
    assert logged[0] == 0.0 and all(math.isfinite(v) and v > 0 for v in logged[1:])
    assert any(not torch.equal(a, b) for a, b in zip(before, model.parameters(), strict=True))


def test_lightning_configure_optimizers_and_monitors(tmp_path) -> None:
    pl = pytest.importorskip("lightning.pytorch")
    from lightning.pytorch.callbacks import LearningRateMonitor
    from lightning.pytorch.loggers import CSVLogger

    from stepsize_tower.integrations.lightning import StepSizeMonitor

    class Module(pl.LightningModule):
        def __init__(self) -> None:
            super().__init__()
            self.net = nn.Sequential(nn.Linear(4, 8), nn.Tanh(), nn.Linear(8, 1))

        def training_step(self, batch: dict[str, torch.Tensor], batch_idx: int) -> torch.Tensor:
            return nn.functional.mse_loss(self.net(batch["inputs"]), batch["labels"])

        def configure_optimizers(self):  # type: ignore[no-untyped-def]
            opt = stepsize_tower.TowerAdam(self.parameters(), lr=1e-3)
            sched = torch.optim.lr_scheduler.CosineAnnealingLR(opt, T_max=16)
            return {"optimizer": opt, "lr_scheduler": {"scheduler": sched, "interval": "step"}}

    torch.manual_seed(0)
    module = Module()
    monitor = StepSizeMonitor()
    trainer = pl.Trainer(
        max_steps=12,
        accelerator="cpu",
        logger=CSVLogger(str(tmp_path), name="run"),
        callbacks=[LearningRateMonitor(logging_interval="step"), monitor],
        enable_checkpointing=False,
        enable_progress_bar=False,
        enable_model_summary=False,
        log_every_n_steps=1,
    )
    loader = torch.utils.data.DataLoader(_Regression(), batch_size=8)
    trainer.fit(module, loader)
    opt = trainer.optimizers[0]
    group = opt.param_groups[0]
    assert int(group["tower"]["step"]) == 12  # Lightning called step(closure) and the closure ran
    rows = list(csv.DictReader(open(next(tmp_path.rglob("metrics.csv")))))
    ours = [float(r["stepsize/level0/group0"]) for r in rows if r.get("stepsize/level0/group0")]
    factors = [float(r["lr-TowerAdam"]) for r in rows if r.get("lr-TowerAdam")]
    assert len(ours) == 12 and len(factors) >= 12
    assert ours[-1] == pytest.approx(float(group[EFFECTIVE_LR_KEY]), rel=1e-9)
    # reference: CosineAnnealingLR's closed form on the typed lr = what Lightning's monitor shows
    assert factors[0] == pytest.approx(1e-3)
    assert ours != factors[: len(ours)]  # ours is the learned step size in use, not the factor
    assert monitor.loggers[0].schedule().steps == 12
