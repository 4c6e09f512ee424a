"""Memory rules of thumb of the network's work, and the training run's inference batch fitted to a budget (plantation.model.memory).

The rules are checked against measured peaks by the faults benchmark's
resource cases (``plantation benchmark-faults``); these tests pin their
arithmetic and the choice they lead to.
"""

from __future__ import annotations

import pytest

from plantation.errors import ConfigError
from plantation.model.memory import INFERENCE_BATCHES, TRAIN_OVERHEAD_MB, fit_training_budget, recurrent_bytes, sample_bytes, series_bytes

NET = {"date_width": 16, "conv_width": 32, "hidden": 64}
# The demo region's shape: 48 dates, 6 bands and 4 indices, 12 years, 5 x 5 neighbourhoods.
SHAPE = {"dates": 48, "channels": 10, "years": 12, "neighbourhood": 5, "network": NET}


def test_a_sample_is_its_float32_features_and_a_validity_byte_per_date_and_pixel():
    assert sample_bytes(dates=48, channels=10, pixels=25) == 48 * 25 * (4 * 10 + 1)


def test_the_network_work_grows_with_pixels_dates_and_width():
    base = series_bytes(pixels=25, dates=48, channels=10, years=12, network=NET)
    assert series_bytes(pixels=50, dates=48, channels=10, years=12, network=NET) == 2 * base  # linear in pixels
    assert series_bytes(pixels=25, dates=96, channels=10, years=12, network=NET) > 1.5 * base
    assert series_bytes(pixels=25, dates=48, channels=10, years=12, network=NET | {"date_width": 32}) > base
    assert recurrent_bytes(pixels=10, years=12, network=NET) == 10 * 12 * 12 * 64 * 4


def _plan(budget: float, **kw):
    args = {"process_mb": 800.0, "batch_size": 64, "distil_batch": 128, "held_pixels": 4000, "inference_batch": 512} | kw
    return fit_training_budget(budget, **SHAPE, **args)


def test_room_enough_keeps_the_configured_inference_batch():
    plan = _plan(10_000)
    assert plan.inference_batch == 512 and plan.need_mb <= 10_000
    # Its parts: the held pixels are exactly their samples' bytes.
    assert plan.held_mb == pytest.approx(4000 * sample_bytes(dates=48, channels=10, pixels=25) / 2**20)
    assert plan.overhead_mb == TRAIN_OVERHEAD_MB


def test_a_tighter_budget_takes_the_largest_batch_that_fits():
    big = _plan(10_000, inference_batch=4096)
    assert big.inference_batch == 4096
    for budget in (3000, 2500, 2000, 1700):
        plan = _plan(budget, inference_batch=4096)
        assert plan.need_mb <= budget and plan.inference_batch in INFERENCE_BATCHES
        bigger = [b for b in INFERENCE_BATCHES if b > plan.inference_batch and b <= 4096]
        if bigger:  # the next batch up would not fit
            assert _plan(10_000, inference_batch=min(bigger)).need_mb > budget


def test_without_distillation_nothing_is_held_and_the_step_is_a_members():
    plan = _plan(10_000, distil_batch=0, held_pixels=0)
    assert plan.held_mb == 0 and plan.step_mb < _plan(10_000).step_mb


def test_a_budget_that_cannot_hold_the_run_is_refused_naming_its_parts():
    expected = (
        r"^memory_budget_mb: 1,000 MB is less than this training needs with an inference batch of 64 \(1,\d{3} MB: 800 MB the process with its samples, "
        r"188 MB distillation's 4,000 unlabelled pixels, \d+ MB an optimiser step, 400 MB training's own\); "
        r"raise the budget, or lower distillation.pixels, training.batch_size or the labelled points$"
    )
    with pytest.raises(ConfigError, match=expected):
        _plan(1000)
