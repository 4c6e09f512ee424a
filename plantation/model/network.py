"""The conversion-year network: dates embedded one by one and summarised per year, convolutions over the yearly summaries, a bidirectional GRU over the years, one distribution over outcomes.

Four stages, each chosen because the outcome is a year:

1. **Date embedding.** Each observed date of each pixel (bands, indices and
   the season as sin/cos of the day of year; with imagery of several
   sensors, a one-hot of the date's sensor) goes through a small shared
   two-layer perceptron.
2. **Yearly summary.** Per pixel and year, the mean and the maximum of the
   embeddings of the dates observed in that year, the mean of their
   normalised features (and, with ``amplitude``, each feature's range), and
   the share of the year's dates observed. Unobserved dates are left out of all, so a masked date
   cannot change the output whatever its stored values (clouds are gaps, not
   data). The maximum keeps what a mean would blur: one clear date after a
   clearing late in the year, and the seasonal amplitude that tells pasture
   from young tree crops (permutation-invariant pooling, Zaheer et al. 2017,
   "Deep Sets"; mean and max pooled per time step as in Garnot et al. 2020,
   "Satellite image time series classification with pixel-set encoders and
   temporal self-attention").
3. **Neighbourhood context.** Unpadded 3 × 3 convolutions over each year's
   summaries of the k × k neighbourhood, down to the centre pixel; the centre
   pixel's own summary goes in beside them. Because nothing before is
   spatial and the convolutions are unpadded, the same network run over a
   whole window returns every interior pixel at once: inference over a tile
   is fully convolutional and gives exactly what per-pixel patches would.
4. **Recurrence over years.** A bidirectional GRU reads one step per year
   (not one per date: a sixth of the steps at six dates a year, and the
   recurrence was most of the cost). The head scores every outcome of
   :mod:`plantation.model.outcomes`: three static outcomes from the whole
   sequence, and one conversion score per year from the states around that
   year and the year's own embedding (the same small network for every year,
   so evidence learnt in one year transfers to the others). A softmax over all
   of them gives one distribution per pixel.

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
    neighbourhood: k, odd; the context has (k − 1) / 2 unpadded 3 × 3 layers.
    date_width: width of the per-date embedding (the yearly summary has
        2 × date_width + n_channels + 1 channels).
    conv_width: channels of the convolutions over the yearly summaries.
    hidden: GRU state size per direction.
    dropout: dropout rate in the year embedding and heads.
    mean, std: (n_channels,) normalisation statistics of the features.
    amplitude: also summarise each year by the range (max − min) of each
        normalised feature over its observed dates.
    epistemic: one more output after the outcome logits, the network's own
        estimate of the ensemble's epistemic term (a network distilled from
        an ensemble, :mod:`plantation.model.distillation`); raw, made
        non-negative by :func:`split_epistemic`.
    n_sensors: sensors in the series. With more than one, each date's
        embedding also reads a one-hot of its sensor (``date_sensor``), so
        that the network can tell a sensor's offset from a change on the
        ground; with one (the default) the network is exactly the one built
        before sensors existed.
    date_sensor: (time,) index of each date's sensor in [0, n_sensors);
        needed when ``n_sensors`` > 1.
    """

    def __init__(
        self,
        n_channels: int,
        date_year: Sequence[int],
        day_of_year: Sequence[float],
        *,
        neighbourhood: int = 5,
        date_width: int = 16,
        conv_width: int = 32,
        hidden: int = 64,
        dropout: float = 0.1,
        mean: Sequence[float] | None = None,
        std: Sequence[float] | None = None,
        epistemic: bool = False,
        amplitude: bool = False,
        n_sensors: int = 1,
        date_sensor: Sequence[int] | None = None,
    ) -> None:
        super().__init__()
        if neighbourhood < 1 or neighbourhood % 2 == 0:
            raise ValueError(f"neighbourhood must be odd and positive, got {neighbourhood!r}")
        if n_sensors < 1:
            raise ValueError(f"n_sensors must be at least 1, got {n_sensors!r}")
        dy = torch.as_tensor(np.asarray(date_year), dtype=torch.long)
        if dy.ndim != 1 or len(dy) == 0 or int(dy.min()) != 0 or torch.any(dy[1:] < dy[:-1]) or torch.any(dy[1:] - dy[:-1] > 1):
            raise ValueError("date_year must be a non-decreasing (time,) index starting at 0 with every year present")
        self.n_channels = n_channels
        self.n_years = int(dy.max()) + 1
        self.neighbourhood = neighbourhood
        self.hidden = hidden
        self.date_width = date_width
        self.epistemic = epistemic
        self.amplitude = amplitude
        self.register_buffer("date_year", dy)
        doy = torch.as_tensor(np.asarray(day_of_year), dtype=torch.float32)
        self.register_buffer("season", torch.stack([torch.sin(2 * np.pi * doy), torch.cos(2 * np.pi * doy)], -1))
        self.n_sensors = n_sensors
        if n_sensors > 1:
            ds = torch.as_tensor(np.asarray(date_sensor if date_sensor is not None else []), dtype=torch.long)
            if ds.shape != dy.shape or int(ds.min()) < 0 or int(ds.max()) >= n_sensors:
                raise ValueError(f"date_sensor must give each of the {len(dy)} dates a sensor index in [0, {n_sensors})")
            # Constant per date like the season: the sensor enters the date embedding through its own weight block.
            self.register_buffer("sensor", nn.functional.one_hot(ds, n_sensors).float())
        self.register_buffer("mean", torch.as_tensor(np.zeros(n_channels) if mean is None else np.asarray(mean), dtype=torch.float32))
        self.register_buffer("std", torch.as_tensor(np.ones(n_channels) if std is None else np.asarray(std), dtype=torch.float32))
        counts = torch.bincount(dy, minlength=self.n_years)
        # Dates are sorted by year: year y is the slice [starts[y], starts[y] + counts[y]).
        self._slices = [(int(s), int(s + c)) for s, c in zip(torch.cumsum(counts, 0) - counts, counts, strict=True)]
        self.register_buffer("dates_in_year", counts.float())

        self.date_embed = nn.Sequential(nn.Linear(n_channels + 2 + (n_sensors if n_sensors > 1 else 0), date_width), nn.GELU(), nn.Linear(date_width, date_width), nn.GELU())
        summary = 2 * date_width + (2 if amplitude else 1) * n_channels + 1
        layers: list[nn.Module] = []
        width = summary
        for _ in range((neighbourhood - 1) // 2):
            layers += [nn.Conv2d(width, conv_width, 3), nn.GELU()]
            width = conv_width
        layers += [nn.Conv2d(width, conv_width, 1), nn.GELU()]
        self.context = nn.Sequential(*layers)
        # The centre pixel's own summary goes in beside the context features.
        self.embed = nn.Sequential(nn.Linear(conv_width + summary, hidden), nn.GELU(), nn.Dropout(dropout))
        self.gru = nn.GRU(hidden, hidden, batch_first=True, bidirectional=True)
        self.year_head = nn.Sequential(nn.Linear(5 * hidden, hidden), nn.GELU(), nn.Dropout(dropout), nn.Linear(hidden, 1))
        self.static_head = nn.Sequential(nn.Linear(4 * hidden, hidden), nn.GELU(), nn.Dropout(dropout), nn.Linear(hidden, N_STATIC + int(epistemic)))

    @property
    def n_outcomes(self) -> int:
        return N_STATIC + self.n_years

    @property
    def n_outputs(self) -> int:
        """Outcome logits, and the epistemic estimate when the network has one."""
        return self.n_outcomes + int(self.epistemic)

    @property
    def halo(self) -> int:
        """Pixels of context the network needs on each side of an output pixel."""
        return (self.neighbourhood - 1) // 2

    def summarise(self, x: torch.Tensor, valid: torch.Tensor) -> torch.Tensor:
        """Yearly summaries of every pixel.

        Args:
            x: float (b, time, channel, h, w), NaN allowed where invalid.
            valid: bool (b, time, h, w).

        Returns:
            (b, years, h, w, 2 · date_width + channel + 1): per year, the mean
            and the maximum of the observed dates' embeddings, the mean of
            their normalised features (all 0 when no date was observed) and
            the share of the year's dates observed.
        """
        z = (x - self.mean[:, None, None]) / self.std[:, None, None]
        z = z.permute(0, 1, 3, 4, 2)  # channels last: (b, t, h, w, c)
        v = valid.unsqueeze(-1)
        z = torch.where(v, torch.nan_to_num(z, nan=0.0), torch.zeros((), dtype=z.dtype))
        # The season (and the sensor) enter through their own weight block rather than a concatenation.
        lin = self.date_embed[0]
        c = self.n_channels
        per_date = self.season if self.n_sensors == 1 else torch.cat([self.season, self.sensor], -1)
        e = nn.functional.linear(z, lin.weight[:, :c]) + nn.functional.linear(per_date, lin.weight[:, c:], lin.bias)[:, None, None, :]
        e = self.date_embed[1:](e)  # (b, t, h, w, D)
        vf = v.to(e.dtype)
        out = []
        for s, t in self._slices:
            seen = vf[:, s:t].sum(1)  # (b, h, w, 1)
            mean = (e[:, s:t] * vf[:, s:t]).sum(1) / seen.clamp(min=1.0)
            peak = e[:, s:t].masked_fill(~v[:, s:t], -torch.inf).amax(1)
            peak = torch.where(seen > 0, peak, torch.zeros((), dtype=e.dtype))
            raw = (z[:, s:t]).sum(1) / seen.clamp(min=1.0)
            parts = [mean, peak, raw]
            if self.amplitude:
                lo = z[:, s:t].masked_fill(~v[:, s:t], torch.inf).amin(1)
                hi = z[:, s:t].masked_fill(~v[:, s:t], -torch.inf).amax(1)
                parts.append(torch.where(seen > 0, hi - lo, torch.zeros((), dtype=z.dtype)))
            out.append(torch.cat([*parts, seen / (t - s)], -1))
        return torch.stack(out, 1)

    def encode(self, x: torch.Tensor, valid: torch.Tensor) -> torch.Tensor:
        """Per-year context features.

        Args:
            x: float (b, time, channel, h, w), NaN allowed where invalid.
            valid: bool (b, time, h, w).

        Returns:
            (b, years, h − 2·halo, w − 2·halo, conv_width + summary): context
            features and the centre pixel's own summary, per output pixel.
        """
        s = self.summarise(x, valid)
        b, y, h, w, f = s.shape
        # (b·y, h, w, f) contiguous is the channels-last layout of (b·y, f, h, w).
        grid = s.reshape(b * y, h, w, f).permute(0, 3, 1, 2)
        if h == self.neighbourhood:
            grid = grid.contiguous()
        ctx = self.context(grid).permute(0, 2, 3, 1)
        r = self.halo
        centre = s[:, :, r : h - r, r : w - r].reshape(b * y, h - 2 * r, w - 2 * r, f)
        out = torch.cat([ctx, centre], -1)
        return out.reshape(b, y, h - 2 * r, w - 2 * r, out.shape[-1])

    def sequence(self, feats: torch.Tensor) -> torch.Tensor:
        """Outcome logits from per-year features of single pixels.

        Args:
            feats: (p, years, conv_width + summary) from :meth:`encode`.

        Returns:
            (p, 3 + n_years) logits, and the raw epistemic estimate last when
            the network has one.
        """
        e = self.embed(feats)
        out = self.gru(e)[0]  # (p, Y, 2H)
        h = self.hidden
        fwd, bwd = out[..., :h], out[..., h:]
        # The first layer of the year head acts on [fwd, bwd, fwd the year
        # before, bwd the year after, e]; applied block by block, the shifted
        # states need no concatenated copy.
        lin = self.year_head[0]
        wt = lin.weight
        z = nn.functional.linear(out, wt[:, : 2 * h], lin.bias) + nn.functional.linear(e, wt[:, 4 * h :])
        z[:, 1:] += nn.functional.linear(fwd[:, :-1], wt[:, 2 * h : 3 * h])
        z[:, :-1] += nn.functional.linear(bwd[:, 1:], wt[:, 3 * h : 4 * h])
        year_logits = self.year_head[1:](z).squeeze(-1)
        static = self.static_head(torch.cat([fwd.mean(1), bwd.mean(1), fwd[:, -1], bwd[:, 0]], -1))
        if self.epistemic:
            return torch.cat([static[:, :N_STATIC], year_logits, static[:, N_STATIC:]], -1)
        return torch.cat([static, year_logits], -1)

    def forward(self, x: torch.Tensor, valid: torch.Tensor) -> torch.Tensor:
        """Outputs (b, n_outputs) of k × k patches (b, time, channel, k, k)."""
        k = self.neighbourhood
        if x.shape[-1] != k or x.shape[-2] != k:
            raise ValueError(f"patches are {tuple(x.shape[-2:])}, the network reads {k} x {k}")
        return self.sequence(self.encode(x, valid)[:, :, 0, 0])

    def forward_window(self, x: torch.Tensor, valid: torch.Tensor, pixel_batch: int | None = None) -> torch.Tensor:
        """Logits for every interior pixel of one window.

        Args:
            x: (time, channel, h, w); valid: (time, h, w).
            pixel_batch: pixels per pass of the recurrent part (None: all at
                once). Batches of a few thousand keep its intermediates in
                cache; the result does not depend on it beyond float rounding.

        Returns:
            (h − 2·halo, w − 2·halo, n_outputs) logits (and epistemic estimate).
        """
        f = self.encode(x.unsqueeze(0), valid.unsqueeze(0))[0]  # (Y, h', w', F)
        y, hh, ww, nf = f.shape
        feats = f.permute(1, 2, 0, 3).reshape(hh * ww, y, nf)
        step = hh * ww if not pixel_batch else pixel_batch
        logits = torch.cat([self.sequence(feats[i : i + step]) for i in range(0, hh * ww, step)])
        return logits.reshape(hh, ww, -1)


def split_epistemic(out: torch.Tensor, n_outcomes: int) -> tuple[torch.Tensor, torch.Tensor | None]:
    """(logits, epistemic estimate in nats ≥ 0 or None) from a network's outputs (…, n_outputs)."""
    if out.shape[-1] == n_outcomes:
        return out, None
    return out[..., :n_outcomes], nn.functional.softplus(out[..., n_outcomes])
