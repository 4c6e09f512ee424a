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

The head scores every outcome of :mod:`plantation.outcomes`: three static
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

from plantation.outcomes import N_STATIC


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
        f = self.encoder(z.reshape(b * t, c + 1, h, w))
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
        from torch.nn.utils.rnn import pack_padded_sequence, pad_packed_sequence

        p, t, d = e.shape
        obs = observed.bool()
        lengths = obs.sum(1)
        order = torch.argsort((~obs).to(torch.int8), dim=1, stable=True)  # observed dates first, in time order
        packed_in = e.gather(1, order.unsqueeze(-1).expand(p, t, d))
        out = e.new_zeros(p, t, 2 * self.hidden)
        some = lengths > 0
        if bool(some.any()):
            packed = pack_padded_sequence(packed_in[some], lengths[some].cpu(), batch_first=True, enforce_sorted=False)
            o, _ = self.gru(packed)
            o, _ = pad_packed_sequence(o, batch_first=True, total_length=t)
            out = out.index_put((torch.nonzero(some).squeeze(1),), o)
        seen = obs.long().cumsum(1)  # observed dates up to and including each date
        fwd_at = seen - 1  # compressed position of the last observed date so far (−1: none)
        bwd_at = seen - obs.long()  # compressed position of the next observed date (= length: none)
        h = self.hidden
        fwd = out[..., :h].gather(1, fwd_at.clamp(0, t - 1).unsqueeze(-1).expand(p, t, h)) * (fwd_at >= 0).unsqueeze(-1)
        bwd = out[..., h:].gather(1, bwd_at.clamp(0, t - 1).unsqueeze(-1).expand(p, t, h)) * (bwd_at < lengths.unsqueeze(1)).unsqueeze(-1)
        return fwd, bwd

    def sequence(self, feats: torch.Tensor, observed: torch.Tensor) -> torch.Tensor:
        """Outcome logits from per-date features of single pixels.

        Args:
            feats: (p, time, conv_width + channel) from :meth:`encode`.
            observed: bool (p, time), whether the centre pixel was observed.

        Returns:
            (p, 3 + n_years) logits.
        """
        p, t, _ = feats.shape
        season = self.season.unsqueeze(0).expand(p, t, 2)
        e = self.embed(torch.cat([feats, season], -1))
        hf_all, hb_all = self.masked_gru(e, observed)
        hf, hb = hf_all[:, -1], hb_all[:, 0]
        both = torch.cat([hf_all, hb_all], -1)
        pooled_year = torch.einsum("ptf,ty->pyf", both, self.year_pool)  # (p, Y, 2H)
        zero = e.new_zeros(p, 1, self.hidden)
        fwd_end = hf_all[:, self.year_last]  # state after each year
        bwd_start = hb_all[:, self.year_first]  # state from each year on
        before = torch.cat([zero, fwd_end[:, :-1]], 1)  # forward state before year y
        after = torch.cat([bwd_start[:, 1:], zero], 1)  # backward state after year y
        z_year = torch.cat([pooled_year, before, after, fwd_end, bwd_start], -1)
        year_logits = self.year_head(z_year).squeeze(-1)
        static = self.static_head(torch.cat([both.mean(1), hf, hb], -1))
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
