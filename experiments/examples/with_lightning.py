"""A tower in a PyTorch Lightning module (configure_optimizers), with both learning-rate monitors.

python experiments/examples/with_lightning.py --steps 100
"""

from __future__ import annotations

import argparse
import sys
import tempfile

import _data
import torch

import stepsize_tower


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--steps", type=int, default=100)
    steps = parser.parse_args().steps
    try:
        import lightning.pytorch as pl
        from lightning.pytorch.callbacks import LearningRateMonitor
        from lightning.pytorch.loggers import CSVLogger

        from stepsize_tower.integrations.lightning import StepSizeMonitor
    except ImportError:
        print("PyTorch Lightning is not installed (pip install 'stepsize_tower[lightning]'): skipping.")
        sys.exit(0)

    class Module(pl.LightningModule):
        def __init__(self) -> None:
            super().__init__()
            self.net = _data.model()

        def training_step(self, batch, batch_idx):
            x, y = batch
            loss = torch.nn.functional.mse_loss(self.net(x), y)
            self.log("train_loss", loss)
            return loss

        def configure_optimizers(self):
            optimizer = stepsize_tower.TowerAdam(self.parameters(), lr=1e-3)  # the one-line swap
            scheduler = torch.optim.lr_scheduler.CosineAnnealingLR(optimizer, T_max=steps)
            return {"optimizer": optimizer, "lr_scheduler": {"scheduler": scheduler, "interval": "step"}}

    xs, ys = zip(*(_data.batch(i, size=8) for i in range(64)), strict=True)
    data = torch.utils.data.TensorDataset(torch.cat(xs), torch.cat(ys))
    monitor = StepSizeMonitor()
    with tempfile.TemporaryDirectory() as logdir:
        trainer = pl.Trainer(
            max_steps=steps,
            accelerator="cpu",
            logger=CSVLogger(logdir),
            callbacks=[LearningRateMonitor(logging_interval="step"), monitor],
            enable_checkpointing=False,
            enable_progress_bar=False,
            enable_model_summary=False,
            log_every_n_steps=max(1, steps // 10),
        )
        trainer.fit(Module(), torch.utils.data.DataLoader(data, batch_size=32, shuffle=True))
    group = trainer.optimizers[0].param_groups[0]
    print(f"LearningRateMonitor (group['lr'], the schedule factor): {group['lr']:.2e}")
    print(f"StepSizeMonitor stepsize/level0/group0 (the step size used): {float(group['effective_lr']):.2e}")


if __name__ == "__main__":
    main()
