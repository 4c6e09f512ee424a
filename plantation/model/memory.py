"""Memory the network's work takes, and a training run's inference batch fitted to a budget.

Rules of thumb in bytes, not a count of every allocation: each is checked
by a resource case of the faults benchmark (``plantation benchmark-faults``),
which measures the peak resident memory of a run against the budget it was
given. Mapping's window estimate (:func:`plantation.mapping.job.window_bytes`)
builds on :func:`series_bytes`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from plantation.errors import ConfigError

#: Bytes of a float32.
F32 = 4
#: What training takes on besides the estimated parts once its samples are cut (Lightning's trainer and logs, the
#: optimiser's state, memory the allocator keeps after the members' and calibration's passes), MB. Measured on the demo
#: region (3,000 points, 48 dates, two members, distillation, bbse prior): peaks 270-355 MB above the estimated parts in eight
#: runs, so 400 leaves a margin.
TRAIN_OVERHEAD_MB = 400
#: Samples per batch of the validation passes inside the optimiser's fits (fixed: the validation loss picks the epoch kept).
VALIDATION_BATCH = 256
#: Inference batches tried, largest first (pixels through the networks at once outside training steps).
INFERENCE_BATCHES: tuple[int, ...] = (4096, 2048, 1024, 512, 256, 128, 64)


def sample_bytes(*, dates: int, channels: int, pixels: int) -> int:
    """Bytes of one sample held in memory: float32 features (dates × channels × pixels) and a validity byte per date and pixel."""
    return dates * pixels * (F32 * channels + 1)


def series_bytes(*, pixels: int, dates: int, channels: int, years: int, network: dict[str, Any]) -> int:
    """Peak bytes of the network's forward pass over the series of ``pixels`` pixels, beyond the inputs.

    The per-date work holds about three copies of the normalised features
    and four of the date embeddings, ``dates × pixels × (3·channels +
    4·date_width) × 4``; the yearly summaries and context features ``years ×
    pixels × 2·(2·date_width + 2·channels + 1 + conv_width) × 4``.
    """
    d = int(network.get("date_width", 16))
    conv = int(network.get("conv_width", 32))
    per_date = dates * pixels * (3 * channels + 4 * d) * F32
    yearly = years * pixels * 2 * (2 * d + 2 * channels + 1 + conv) * F32
    return int(per_date + yearly)


def recurrent_bytes(*, pixels: int, years: int, network: dict[str, Any]) -> int:
    """Bytes of the recurrent part over ``pixels`` pixels: ``pixels × years × 12·hidden × 4`` (embedding, both GRU directions with their gates, the year head)."""
    return int(pixels * years * 12 * int(network.get("hidden", 64)) * F32)


@dataclass(frozen=True)
class TrainingBudget:
    """How a training process's memory budget is spent, MB (a process: each of DDP's processes has the whole budget)."""

    budget_mb: float
    #: The process when the samples are cut (measured: interpreter, libraries, the samples).
    process_mb: float
    #: Unlabelled pixels held for distillation.
    held_mb: float
    #: :data:`TRAIN_OVERHEAD_MB`.
    overhead_mb: float
    #: The larger of a member's and the distillation's optimiser step.
    step_mb: float
    #: Pixels through the networks at once outside the fits (calibration, test scores, the prior, reading unlabelled pixels).
    inference_batch: int
    inference_mb: float

    @property
    def need_mb(self) -> float:
        """Estimated peak of the run."""
        return self.process_mb + self.held_mb + self.overhead_mb + max(self.step_mb, self.inference_mb)


def fit_training_budget(
    budget_mb: float,
    *,
    process_mb: float,
    dates: int,
    channels: int,
    years: int,
    neighbourhood: int,
    network: dict[str, Any],
    batch_size: int,
    distil_batch: int,
    held_pixels: int,
    inference_batch: int,
) -> TrainingBudget:
    """The largest inference batch (at most ``inference_batch``, from :data:`INFERENCE_BATCHES`) whose run fits in ``budget_mb``.

    A training step of ``b`` samples holds their inputs and about twice the
    forward pass (activations kept for the backward pass, and their
    gradients); a distillation step of ``distil_batch`` samples (0: no
    distillation) adds the members' forward pass without gradients; the
    fits' validation passes take :data:`VALIDATION_BATCH` samples. An inference batch of ``B``
    holds the pixels as read and as features, and one network's forward
    pass (the members run one after the other). The optimiser's batch size is
    not changed: it changes what is learned.

    Raises:
        ConfigError: not even the smallest inference batch fits, naming what takes the budget and what to lower.
    """
    px = neighbourhood * neighbourhood
    one = sample_bytes(dates=dates, channels=channels, pixels=px)
    fwd = series_bytes(pixels=px, dates=dates, channels=channels, years=years, network=network) + recurrent_bytes(pixels=1, years=years, network=network)
    mb = 2.0**20
    held = held_pixels * one / mb
    step = max(batch_size * (one + 2 * fwd), distil_batch * (one + 3 * fwd), VALIDATION_BATCH * (2 * one + fwd)) / mb
    tried = [b for b in INFERENCE_BATCHES if b < inference_batch]
    for b in (inference_batch, *tried):
        plan = TrainingBudget(float(budget_mb), process_mb, held, float(TRAIN_OVERHEAD_MB), step, b, b * (2 * one + fwd) / mb)
        if plan.need_mb <= budget_mb:
            return plan
    raise ConfigError(
        f"memory_budget_mb: {budget_mb:,.0f} MB is less than this training needs with an inference batch of {plan.inference_batch} "
        f"({plan.need_mb:,.0f} MB: {process_mb:,.0f} MB the process with its samples, {held:,.0f} MB distillation's {held_pixels:,} unlabelled pixels, "
        f"{step:,.0f} MB an optimiser step, {TRAIN_OVERHEAD_MB} MB training's own); raise the budget, or lower distillation.pixels, training.batch_size or the labelled points"
    )
