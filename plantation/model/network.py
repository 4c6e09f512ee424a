"""The conversion-year network: a convolutional encoder shared over dates, a masked bidirectional GRU, and one distribution over outcomes.

Per date, a stack of unpadded 3 × 3 convolutions reads the k × k
neighbourhood (bands, indices and the validity mask) down to the centre
pixel. Because the convolutions are unpadded, the same encoder run over a
whole window returns features for every interior pixel at once: inference
over a tile is fully convolutional and gives exactly what per-pixel patches
would.

A bidirectional GRU reads the dates of each pixel. On a date when the centre
pixel is not observed the recurrent state is carried over unchanged, so a
masked date cannot change the output whatever its stored values.

The head scores every outcome of :mod:`plantation.model.outcomes`: three static
outcomes from the whole sequence, and one conversion score per year from the
states around that year (the same small network for every year, so evidence
learnt in one year transfers to the others). A softmax over all of them gives
one distribution per pixel.

Inputs are normalised inside the network with statistics stored as buffers,
so an exported artefact needs nothing else.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np
import torch
from torch import nn

from plantation.model.outcomes import N_STATIC


class ConvRecurrentNet(nn.Module):
    """Args (plain numbers, so a checkpoint rebuilds without a config):
    n_channels: feature channels per date (bands + indices).
    date_year: (time,) index into the series' years of each date.
    day_of_year: (time,) position of each date in its year, [0, 1).
    neighbourhood: k, odd; the encoder has (k − 1) / 2 unpadded 3 × 3 layers.
    conv_width: channels of the convolutional encoder.
    hidden: GRU state size per direction.
    dropout: dropout rate in the date embedding and heads.
    mean, std: (n_channels,) normalisation statistics of the features.
    """

    def __init__(
        self,
        n_channels: int,
        date_year: Sequence[int],
        day_of_year: Sequence[float],
        *,
        neighbourhood: int = 5,
        conv_width: int = 32,
        hidden: int = 64,
        dropout: float = 0.1,
        mean: Sequence[float] | None = None,
        std: Sequence[float] | None = None,
    ) -> None:
        super().__init__()
        if neighbourhood < 1 or neighbourhood % 2 == 0:
            raise ValueError(f"neighbourhood must be odd and positive, got {neighbourhood!r}")
        dy = torch.as_tensor(np.asarray(date_year), dtype=torch.long)
        if dy.ndim != 1 or len(dy) == 0 or int(dy.min()) != 0 or torch.any(dy[1:] < dy[:-1]):
            raise ValueError("date_year must be a non-decreasing (time,) index starting at 0")
        self.n_channels = n_channels
        self.n_years = int(dy.max()) + 1
        self.neighbourhood = neighbourhood
        self.hidden = hidden
        self.register_buffer("date_year", dy)
        doy = torch.as_tensor(np.asarray(day_of_year), dtype=torch.float32)
        self.register_buffer("season", torch.stack([torch.sin(2 * np.pi * doy), torch.cos(2 * np.pi * doy)], -1))
        self.register_buffer("mean", torch.as_tensor(np.zeros(n_channels) if mean is None else np.asarray(mean), dtype=torch.float32))
        self.register_buffer("std", torch.as_tensor(np.ones(n_channels) if std is None else np.asarray(std), dtype=torch.float32))
        onehot = torch.nn.functional.one_hot(dy, self.n_years).float()
        self.register_buffer("year_pool", onehot / onehot.sum(0, keepdim=True))
        self.register_buffer("year_last", torch.tensor([int(torch.nonzero(dy == y).max()) for y in range(self.n_years)]))
        self.register_buffer("year_first", torch.tensor([int(torch.nonzero(dy == y).min()) for y in range(self.n_years)]))

        layers: list[nn.Module] = []
        width = n_channels + 1
        for _ in range((neighbourhood - 1) // 2):
            layers += [nn.Conv2d(width, conv_width, 3), nn.GELU()]
            width = conv_width
        layers += [nn.Conv2d(width, conv_width, 1), nn.GELU()]
        self.encoder = nn.Sequential(*layers)
        # The centre pixel's own values go in beside the context features.
        self.embed = nn.Sequential(nn.Linear(conv_width + n_channels + 2, hidden), nn.GELU(), nn.Dropout(dropout))
        self.gru = nn.GRU(hidden, hidden, batch_first=True, bidirectional=True)
        self.year_head = nn.Sequential(nn.Linear(6 * hidden, hidden), nn.GELU(), nn.Dropout(dropout), nn.Linear(hidden, 1))
        self.static_head = nn.Sequential(nn.Linear(4 * hidden, hidden), nn.GELU(), nn.Dropout(dropout), nn.Linear(hidden, N_STATIC))

    @property
    def n_outcomes(self) -> int:
        return N_STATIC + self.n_years

    @property
    def halo(self) -> int:
        """Pixels of context the encoder needs on each side of an output pixel."""
        return (self.neighbourhood - 1) // 2

    def normalise(self, x: torch.Tensor, valid: torch.Tensor) -> torch.Tensor:
        """(…, time, channel, h, w) features → normalised, 0 where invalid, with the mask appended as a channel."""
        z = (x - self.mean[:, None, None]) / self.std[:, None, None]
        v = valid.unsqueeze(-3)
        z = torch.where(v, torch.nan_to_num(z, nan=0.0), torch.zeros((), dtype=z.dtype))
        return torch.cat([z, v.to(z.dtype)], dim=-3)

    def encode(self, x: torch.Tensor, valid: torch.Tensor) -> torch.Tensor:
        """Per-date context features.

        Args:
            x: float (b, time, channel, h, w), NaN allowed where invalid.
            valid: bool (b, time, h, w).

        Returns:
            (b, time, conv_width + channel, h − 2·halo, w − 2·halo): encoder
            output and the normalised centre values of each output pixel.
        """
        b, t, c, h, w = x.shape
        z = self.normalise(x, valid)
        z2 = z.reshape(b * t, c + 1, h, w)
        if h > self.neighbourhood:
            # Whole windows: oneDNN convolves channels-last images markedly faster.
            z2 = z2.contiguous(memory_format=torch.channels_last)
        f = self.encoder(z2)
        r = self.halo
        centre = z[:, :, :c, r : h - r, r : w - r].reshape(b * t, c, h - 2 * r, w - 2 * r)
        out = torch.cat([f, centre], 1)
        return out.reshape(b, t, out.shape[1], h - 2 * r, w - 2 * r)

    def masked_gru(self, e: torch.Tensor, observed: torch.Tensor) -> tuple[torch.Tensor, torch.Tensor]:
        """Bidirectional GRU that skips unobserved dates.

        The state after an unobserved date is the state before it, in each
        direction; before the first observed date it is zero. Implemented by
        moving each pixel's observed dates to the front, running the fused GRU
        on packed sequences, and carrying the states back to every date.

        Args:
            e: (p, time, hidden) date embeddings; observed: bool (p, time).

        Returns:
            (forward states, backward states), each (p, time, hidden).
        """
        from torch.nn.utils.rnn import PackedSequence

        p, t, d = e.shape
        h = self.hidden
        obs = observed.bool()
        lengths = obs.sum(1)
        # The packed layout by hand: pixels sorted by length (longest first);
        # compressed step j of the pixel ranked r sits at row offsets[j] + r.
        # Building it with index arithmetic avoids padding and unpadding.
        sorted_len, sorted_idx = torch.sort(lengths, descending=True, stable=True)
        n_steps = int(sorted_len[0]) if p else 0
        if n_steps == 0:
            zero = e.new_zeros(p, t, h)
            return zero, zero.clone()
        rank = torch.empty_like(sorted_idx)
        rank[sorted_idx] = torch.arange(p, device=e.device)
        batch_sizes = (sorted_len.unsqueeze(0) > torch.arange(n_steps, device=e.device).unsqueeze(1)).sum(1)
        offsets = torch.cumsum(batch_sizes, 0) - batch_sizes
        total = int(batch_sizes.sum())
        seen = obs.long().cumsum(1)  # observed dates up to and including each date
        rows = offsets[(seen - 1).clamp(0, n_steps - 1)] + rank.unsqueeze(1)  # (p, t)
        src = torch.empty(total, dtype=torch.long, device=e.device)
        src[rows[obs]] = torch.nonzero(obs.reshape(-1)).squeeze(1)
        # No sorted/unsorted indices: the rows are already in sorted order, and
        # the final states (which they would permute) are not used.
        packed = PackedSequence(e.reshape(p * t, d).index_select(0, src), batch_sizes.cpu())
        out = self.gru(packed)[0].data  # (total, 2H)
        fwd_at = seen - 1  # compressed position of the last observed date so far (−1: none)
        bwd_at = seen - obs.long()  # compressed position of the next observed date (= length: none)
        fwd_ok = (fwd_at >= 0).unsqueeze(-1)
        bwd_ok = (bwd_at < lengths.unsqueeze(1)).unsqueeze(-1)
        fwd_rows = (offsets[fwd_at.clamp(0, n_steps - 1)] + rank.unsqueeze(1)).clamp(max=total - 1)
        bwd_rows = (offsets[bwd_at.clamp(0, n_steps - 1)] + rank.unsqueeze(1)).clamp(max=total - 1)
        fwd = out[:, :h].index_select(0, fwd_rows.reshape(-1)).reshape(p, t, h) * fwd_ok
        bwd = out[:, h:].index_select(0, bwd_rows.reshape(-1)).reshape(p, t, h) * bwd_ok
        return fwd, bwd

    def sequence(self, feats: torch.Tensor, observed: torch.Tensor) -> torch.Tensor:
        """Outcome logits from per-date features of single pixels.

        Args:
            feats: (p, time, conv_width + channel) from :meth:`encode`.
            observed: bool (p, time), whether the centre pixel was observed.

        Returns:
            (p, 3 + n_years) logits.
        """
        p, t, nf = feats.shape
        # The Linear layers below act on concatenations; applying their weight
        # blocks part by part gives the same numbers without building them.
        lin = self.embed[0]
        e = self.embed[1:](nn.functional.linear(feats, lin.weight[:, :nf]) + nn.functional.linear(self.season, lin.weight[:, nf:], lin.bias))
        hf_all, hb_all = self.masked_gru(e, observed)
        hf, hb = hf_all[:, -1], hb_all[:, 0]
        h = self.hidden
        fwd_end = hf_all[:, self.year_last]  # (p, Y, H) state after each year
        bwd_start = hb_all[:, self.year_first]  # state from each year on
        w = self.year_head[0].weight  # blocks: pooled fwd, pooled bwd, before, after, fwd_end, bwd_start
        pool = self.year_pool.t()  # (Y, t)
        z = nn.functional.linear(torch.matmul(pool, hf_all), w[:, :h]) + nn.functional.linear(torch.matmul(pool, hb_all), w[:, h : 2 * h])
        fe = nn.functional.linear(fwd_end, torch.cat([w[:, 2 * h : 3 * h], w[:, 4 * h : 5 * h]]))  # (p, Y, 2H)
        bs = nn.functional.linear(bwd_start, torch.cat([w[:, 3 * h : 4 * h], w[:, 5 * h :]]))
        z = z + fe[..., h:] + bs[..., h:] + self.year_head[0].bias
        z[:, 1:] += fe[:, :-1, :h]  # forward state before year y
        z[:, :-1] += bs[:, 1:, :h]  # backward state after year y
        year_logits = self.year_head[1:](z).squeeze(-1)
        static = self.static_head(torch.cat([hf_all.mean(1), hb_all.mean(1), hf, hb], -1))
        return torch.cat([static, year_logits], -1)

    def forward(self, x: torch.Tensor, valid: torch.Tensor) -> torch.Tensor:
        """Logits (b, 3 + n_years) of k × k patches (b, time, channel, k, k)."""
        k = self.neighbourhood
        if x.shape[-1] != k or x.shape[-2] != k:
            raise ValueError(f"patches are {tuple(x.shape[-2:])}, the network reads {k} x {k}")
        f = self.encode(x, valid)[..., 0, 0]
        r = self.halo
        return self.sequence(f, valid[:, :, r, r])

    def forward_window(self, x: torch.Tensor, valid: torch.Tensor, pixel_batch: int | None = None) -> torch.Tensor:
        """Logits for every interior pixel of one window.

        Args:
            x: (time, channel, h, w); valid: (time, h, w).
            pixel_batch: pixels per pass of the recurrent part (None: all at
                once). Batches of a few thousand keep its intermediates in
                cache; the result does not depend on it beyond float rounding.

        Returns:
            (h − 2·halo, w − 2·halo, 3 + n_years) logits.
        """
        f = self.encode(x.unsqueeze(0), valid.unsqueeze(0))[0]  # (t, F, h', w')
        t, nf, hh, ww = f.shape
        r = self.halo
        obs = valid[:, r : valid.shape[1] - r, r : valid.shape[2] - r].permute(1, 2, 0).reshape(hh * ww, t)
        feats = f.permute(2, 3, 0, 1).reshape(hh * ww, t, nf)
        step = hh * ww if not pixel_batch else pixel_batch
        logits = torch.cat([self.sequence(feats[i : i + step], obs[i : i + step]) for i in range(0, hh * ww, step)])
        return logits.reshape(hh, ww, -1)
