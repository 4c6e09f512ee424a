"""What every Lightning task that trains a :class:`~plantation.model.network.ConvRecurrentNet` shares: augmentation, the step hooks, the optimiser."""

from __future__ import annotations

from typing import Any

import lightning as L
import torch


class SeriesTask(L.LightningModule):
    """Base of the training tasks: subclasses set ``self.net`` and implement :meth:`step`.

    :meth:`settings` gives (learning rate, weight decay, epochs of the cosine
    decay, share of dates hidden by augmentation).
    """

    net: torch.nn.Module

    def settings(self) -> tuple[float, float, int, float]:
        raise NotImplementedError

    def step(self, batch: tuple[torch.Tensor, ...], stage: str) -> torch.Tensor:
        raise NotImplementedError

    def augment(self, x: torch.Tensor, valid: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Patches (b, time, channel, k, k) rotated and mirrored as a whole, with extra dates hidden."""
        # The landscape has no preferred orientation: rotate and mirror whole
        # neighbourhoods. Hiding extra dates imitates a cloudier year.
        k = int(torch.randint(0, 4, ()).item())
        x = torch.rot90(x, k, (-2, -1))
        valid = torch.rot90(valid, k, (-2, -1))
        if torch.rand(()) < 0.5:
            x, valid = x.flip(-1), valid.flip(-1)
        p = self.settings()[3]
        if p > 0:
            keep = torch.rand(valid.shape[:2], device=valid.device) >= p
            valid = valid & keep[:, :, None, None]
        return x, valid

    def training_step(self, batch: tuple[torch.Tensor, ...], batch_idx: int) -> torch.Tensor:
        return self.step(batch, "train")

    def validation_step(self, batch: tuple[torch.Tensor, ...], batch_idx: int) -> torch.Tensor:
        return self.step(batch, "val")

    def configure_optimizers(self) -> Any:
        # AdamW, the learning rate decayed to 0 by a cosine over the epochs.
        lr, weight_decay, epochs, _ = self.settings()
        opt = torch.optim.AdamW(self.net.parameters(), lr=lr, weight_decay=weight_decay)
        sched = torch.optim.lr_scheduler.CosineAnnealingLR(opt, T_max=max(1, epochs))
        return {"optimizer": opt, "lr_scheduler": sched}
