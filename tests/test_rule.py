"""The index-drop rule's automatic labels, on tiny series built in code with a known answer.

Sources of the check values: the index formulas of check_values.md (NDVI
Rouse et al. 1974; NBR Key & Benson 2006), whose values for the spectra
below are checked against spyndex (Montero et al. 2023), and the thresholds'
own sources in :class:`plantation.reference.rule.RuleThresholds` (dNBR 0.27
"moderate-low severity" of Key & Benson 2006 below the 0.3 drop).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from plantation.errors import ConfigError, RegionError
from plantation.imagery import indices
from plantation.imagery.config import LabelsConfig, MaskConfig, RegionConfig, ScalingRule, TileConfig
from plantation.imagery.region import open_region
from plantation.reference.rule import ABSTAIN, RuleThresholds, draw_rule_labels, rule_labels
from tests.conftest import BANDS, CRS, pixel_centre, write_stack

YEARS = list(range(2013, 2021))  # eight years
PER_YEAR = 4
DATE_YEARS = np.repeat(YEARS, PER_YEAR)

# Surface reflectance of each cover, bands blue, green, red, nir, swir1, swir2,
# with NDVI and NBR by the formulas (hand-computed; checked against spyndex below).
SPECTRA = {
    # NDVI = (0.35 − 0.03) / 0.38 = 0.842; NBR = (0.35 − 0.07) / 0.42 = 0.667: forest.
    "forest": ([0.02, 0.05, 0.03, 0.35, 0.15, 0.07], 0.32 / 0.38, 0.28 / 0.42),
    # NDVI = 0.08 / 0.32 = 0.25; NBR = 0: cleared or bare soil (dNBR from forest 0.667, "high" severity).
    "cleared": ([0.08, 0.10, 0.12, 0.20, 0.25, 0.20], 0.08 / 0.32, 0.0),
    # NDVI = 0.26 / 0.34 = 0.765; NBR = 0.2 / 0.4 = 0.5: a young tree crop, green again.
    "young_crop": ([0.03, 0.06, 0.04, 0.30, 0.18, 0.10], 0.26 / 0.34, 0.5),
    # NDVI = 0.07 / 0.37 = 0.189; NBR = −0.03 / 0.47 = −0.064: bare soil.
    "bare": ([0.10, 0.13, 0.15, 0.22, 0.30, 0.25], 0.07 / 0.37, -0.03 / 0.47),
    # NDVI = 0.24 / 0.36 = 0.667; NBR = 0.21 / 0.39 = 0.538: green, not closed canopy, not low.
    "woody_green": ([0.03, 0.06, 0.06, 0.30, 0.16, 0.09], 0.24 / 0.36, 0.21 / 0.39),
    # A bright cloud: NDVI = 0.02 / 0.8 = 0.025, NBR = 0.
    "cloud": ([0.40, 0.40, 0.39, 0.41, 0.40, 0.41], 0.02 / 0.80, 0.0),
}


def series(*covers: str) -> np.ndarray:
    """(time, band) reflectance: one cover per year (PER_YEAR dates each), or one per date."""
    per = [np.asarray(SPECTRA[c][0], np.float32) for c in covers]
    if len(per) == len(YEARS):
        per = [p for p in per for _ in range(PER_YEAR)]
    if len(per) != len(DATE_YEARS):
        raise ValueError(f"{len(per)} covers for {len(DATE_YEARS)} dates")
    return np.stack(per)


def run(*pixels: np.ndarray, valid: np.ndarray | None = None, thresholds: RuleThresholds | None = None) -> tuple[np.ndarray, np.ndarray]:
    refl = np.stack(pixels).astype(np.float32)
    ok = np.ones(refl.shape[:2], bool) if valid is None else valid
    refl = np.where(ok[..., None], refl, np.nan)
    return rule_labels(refl, ok, BANDS, DATE_YEARS, YEARS, thresholds)


CONVERSION = ("forest", "forest", "cleared", "cleared", "young_crop", "young_crop", "young_crop", "young_crop")
CLEARED_FOR_GOOD = ("forest", "forest", "cleared", "bare", "bare", "bare", "bare", "bare")


def test_spectra_indices_match_the_published_formulas():
    """The hand-computed NDVI and NBR above, by our indices and by spyndex's catalogue formulas."""
    spyndex = pytest.importorskip("spyndex")
    refl = np.array([s for s, _, _ in SPECTRA.values()])
    hand_ndvi = np.array([n for _, n, _ in SPECTRA.values()])
    hand_nbr = np.array([b for _, _, b in SPECTRA.values()])
    red, nir, swir2 = refl[:, 2], refl[:, 3], refl[:, 5]
    np.testing.assert_allclose(indices.ndvi(nir, red), hand_ndvi, rtol=1e-12)
    np.testing.assert_allclose(indices.nbr(nir, swir2), hand_nbr, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(np.asarray(spyndex.computeIndex(index="NDVI", params={"N": nir, "R": red})), hand_ndvi, rtol=1e-12)
    np.testing.assert_allclose(np.asarray(spyndex.computeIndex(index="NBR", params={"N": nir, "S2": swir2})), hand_nbr, rtol=1e-12, atol=1e-15)
    # The covers sit where the tests need them against the default thresholds.
    th = RuleThresholds()
    f, c, y = SPECTRA["forest"], SPECTRA["cleared"], SPECTRA["young_crop"]
    assert f[1] >= th.forest_ndvi and f[2] >= th.forest_nbr
    assert f[2] - c[2] >= th.drop_nbr > 0.27  # above Key & Benson's moderate-low dNBR
    assert th.regrowth_ndvi <= y[1] < th.forest_ndvi or y[2] < th.forest_nbr
    w = SPECTRA["woody_green"]
    assert th.other_ndvi <= w[1] < th.forest_ndvi and th.other_nbr <= w[2] < th.forest_nbr


def test_conversion_with_regrowth_is_dated_to_the_drop():
    labels, onset = run(series(*CONVERSION))
    assert labels.tolist() == ["conversion"] and onset.tolist() == [2015]


def test_clearing_on_the_last_date_of_a_year_is_dated_to_that_year():
    per_date = ["forest"] * 11 + ["cleared"] + ["cleared"] * 4 + ["young_crop"] * 16
    labels, onset = run(series(*per_date))
    assert labels.tolist() == ["conversion"] and onset.tolist() == [2015]


def test_onset_is_the_first_large_drop_not_the_deepest():
    # A moderate clearing (NBR 0.667 → 0.3, drop 0.37) in 2015, burnt to −0.06 in 2016: onset 2015.
    burnt = series(*CONVERSION)
    half = np.asarray(SPECTRA["forest"][0], np.float32) * 0.5 + np.asarray(SPECTRA["cleared"][0], np.float32) * 0.5
    burnt[8:12] = half
    burnt[12:16] = SPECTRA["bare"][0]
    assert 0.3 <= SPECTRA["forest"][2] - indices.nbr(half[3], half[5]) < SPECTRA["forest"][2] - SPECTRA["bare"][2]
    labels, onset = run(burnt)
    assert labels.tolist() == ["conversion"] and onset.tolist() == [2015]


def test_clearing_without_regrowth_is_other():
    labels, onset = run(series(*CLEARED_FOR_GOOD))
    assert labels.tolist() == ["other"] and onset.tolist() == [0]


def test_recent_clearing_without_regrowth_abstains():
    # Cleared in 2019, the series ends in 2020: too early to tell pasture from a young crop.
    labels, _ = run(series("forest", "forest", "forest", "forest", "forest", "forest", "cleared", "bare"))
    assert labels.tolist() == [ABSTAIN]


def test_flat_forest_is_stable_forest():
    labels, onset = run(series(*["forest"] * 8))
    assert labels.tolist() == ["stable_forest"] and onset.tolist() == [0]


def test_clouds_and_gaps_do_not_make_a_drop():
    # Forest with cloud values on invalid dates (masked by validity, not by NaN), one year
    # wholly unobserved, and NaN reflectance on a date flagged valid: still stable forest.
    refl = series(*["forest"] * 8)
    valid = np.ones(len(DATE_YEARS), bool)
    cloudy = [1, 2, 6, 9, 10, 11, 17, 25, 30]
    refl[cloudy] = SPECTRA["cloud"][0]
    valid[cloudy] = False
    valid[12:16] = False  # 2016 unobserved
    refl[12:16] = SPECTRA["cloud"][0]
    refl[20] = np.nan  # valid but without data
    labels, onset = rule_labels(refl[None], valid[None], BANDS, DATE_YEARS, YEARS)
    assert labels.tolist() == ["stable_forest"] and onset.tolist() == [0]
    # The same cloud dates flagged valid would be read as a drop: the mask is what prevents it.
    valid_all = np.ones_like(valid[None])
    labels, _ = rule_labels(refl[None], valid_all, BANDS, DATE_YEARS, YEARS)
    assert labels.tolist() != ["stable_forest"]


def test_never_clear_abstains():
    refl = series(*["forest"] * 8)
    labels, onset = rule_labels(refl[None], np.zeros((1, len(DATE_YEARS)), bool), BANDS, DATE_YEARS, YEARS)
    assert labels.tolist() == [ABSTAIN] and onset.tolist() == [0]
    nan = np.full_like(refl, np.nan)[None]
    assert rule_labels(nan, np.ones((1, len(DATE_YEARS)), bool), BANDS, DATE_YEARS, YEARS)[0].tolist() == [ABSTAIN]


def test_too_few_clear_years_abstains():
    valid = np.zeros((1, len(DATE_YEARS)), bool)
    valid[0, : 4 * PER_YEAR : PER_YEAR] = True  # one clear date in each of four years
    refl = np.where(valid[..., None], series(*["forest"] * 8)[None], np.nan)
    assert rule_labels(refl, valid, BANDS, DATE_YEARS, YEARS)[0].tolist() == [ABSTAIN]
    valid[0, 4 * PER_YEAR] = True  # a fifth year: enough
    refl = np.where(valid[..., None], series(*["forest"] * 8)[None], np.nan)
    assert rule_labels(refl, valid, BANDS, DATE_YEARS, YEARS)[0].tolist() == ["stable_forest"]
    # A year needs min_dates_per_year clear dates to count.
    assert rule_labels(refl, valid, BANDS, DATE_YEARS, YEARS, RuleThresholds(min_dates_per_year=2))[0].tolist() == [ABSTAIN]


def test_low_ndvi_is_other_and_green_but_not_forest_abstains():
    labels, onset = run(series(*["bare"] * 8), series(*["woody_green"] * 8))
    assert labels.tolist() == ["other", ABSTAIN] and onset.tolist() == [0, 0]


def test_drop_in_the_first_two_years_abstains():
    # No forest baseline before the drop.
    labels, _ = run(series("forest", "cleared", "young_crop", "young_crop", "young_crop", "young_crop", "young_crop", "young_crop"))
    assert labels.tolist() == [ABSTAIN]


def test_drop_below_the_threshold_is_not_a_clearing():
    # NBR 0.667 → 0.40 on one date (drop 0.27, "moderate-low" by Key & Benson): no clearing at drop_nbr 0.3.
    refl = series(*["forest"] * 8)
    thin = np.asarray(SPECTRA["forest"][0], np.float32).copy()
    thin[5] = thin[3] * (1 - 0.40) / (1 + 0.40)  # swir2 for NBR 0.40
    refl[13] = thin
    drop = SPECTRA["forest"][2] - float(indices.nbr(thin[3], thin[5]))
    assert 0.26 < drop < 0.3
    assert run(refl)[0].tolist() == ["stable_forest"]
    labels, onset = run(refl, thresholds=RuleThresholds(drop_nbr=0.25))  # the threshold is what decides
    assert labels.tolist() == ["conversion"] and onset.tolist() == [2016]


def test_each_pixel_is_labelled_on_its_own():
    """Vectorised over pixels: a batch gives what each pixel gives alone, whatever its neighbours."""
    rng = np.random.default_rng(0)
    kinds = [CONVERSION, CLEARED_FOR_GOOD, ["forest"] * 8, ["bare"] * 8, ["woody_green"] * 8]
    pix = np.stack([series(*kinds[i % len(kinds)]) for i in range(40)])
    pix *= rng.uniform(0.97, 1.03, pix.shape).astype(np.float32)
    valid = rng.random(pix.shape[:2]) > 0.3
    refl = np.where(valid[..., None], pix, np.nan)
    labels, onset = rule_labels(refl, valid, BANDS, DATE_YEARS, YEARS)
    one = [rule_labels(refl[i : i + 1], valid[i : i + 1], BANDS, DATE_YEARS, YEARS) for i in range(len(pix))]
    assert labels.tolist() == [lab[0] for lab, _ in one]
    assert onset.tolist() == [int(o[0]) for _, o in one]
    assert {"conversion", "other", "stable_forest"} <= set(labels.tolist())


def test_band_order_is_read_from_the_names():
    refl = np.stack([series(*CONVERSION)])
    order = [5, 3, 0, 2, 4, 1]
    labels, onset = rule_labels(refl[..., order], np.ones(refl.shape[:2], bool), [BANDS[i] for i in order], DATE_YEARS, YEARS)
    assert labels.tolist() == ["conversion"] and onset.tolist() == [2015]


def test_bad_inputs_raise():
    refl = series(*["forest"] * 8)[None]
    with pytest.raises(ConfigError, match="swir2"):
        rule_labels(refl[..., :5], np.ones(refl.shape[:2], bool), BANDS[:5], DATE_YEARS, YEARS)
    with pytest.raises(RegionError, match="disagree"):
        rule_labels(refl, np.ones((1, 3), bool), BANDS, DATE_YEARS, YEARS)
    with pytest.raises(ConfigError, match="rule.min_clear_years"):
        RuleThresholds(min_clear_years=3)
    with pytest.raises(ConfigError, match="rule.forest_ndvi"):
        RuleThresholds(forest_ndvi=1.5)


# --------------------------------------------------------------------------- #
# Drawing pixels from a region on disk
# --------------------------------------------------------------------------- #

DATES = [f"{y}-{m}" for y in YEARS for m in ("03-01", "09-01")]
N_DATES = len(DATES)


def _tile_values(width: int) -> tuple[np.ndarray, np.ndarray, dict[tuple[int, int], tuple[str, int]]]:
    """(time, band, 8, width) stored integers, QA, and the expected answer per pixel.

    Rows 0–1 forest converted in 2016 and green again from 2017; rows 2–3 cleared in 2015
    and bare after; rows 4–5 bare soil; rows 6–7 stable forest, with clouds flagged in QA.
    """
    h = 8
    years = np.repeat(YEARS, 2)
    refl = np.empty((N_DATES, 6, h, width), np.float32)
    qa = np.zeros((N_DATES, h, width), np.int16)
    want: dict[tuple[int, int], tuple[str, int]] = {}

    def fill(rows: slice, covers: list[str]) -> None:
        for t, c in enumerate(covers):
            refl[t, :, rows, :] = np.asarray(SPECTRA[c][0])[:, None, None]

    fill(slice(0, 2), ["forest" if y < 2016 else "cleared" if y == 2016 else "young_crop" for y in years])
    fill(slice(2, 4), ["forest" if y < 2015 else "bare" for y in years])
    fill(slice(4, 6), ["bare"] * N_DATES)
    fill(slice(6, 8), ["forest"] * N_DATES)
    refl[[3, 8, 13], :, 6:8, :] = np.asarray(SPECTRA["cloud"][0])[:, None, None]
    qa[[3, 8, 13], 6:8, :] = 1  # cloud bit
    for r in range(h):
        for c in range(width):
            want[(r, c)] = [("conversion", 2016), ("other", 0), ("other", 0), ("stable_forest", 0)][r // 2]
    return np.round(refl * 10000).astype(np.int16), qa, want


@pytest.fixture
def two_tiles(tmp_path: Path) -> tuple[RegionConfig, dict[str, dict[tuple[int, int], tuple[str, int]]]]:
    answers = {}
    tiles = []
    for name, width in (("a", 8), ("b", 16)):
        values, qa, want = _tile_values(width)
        folder = write_stack(tmp_path / name, DATES, values, qa)
        tiles.append(TileConfig(name=name, path=str(folder)))
        answers[name] = want
    region = RegionConfig(
        name="rule",
        tiles=tiles,
        bands=BANDS,
        nodata=-9999,
        mask=MaskConfig(band=7, invalid_bits=[0, 1, 2]),
        scaling=[ScalingRule(start=None, scale=1e-4, offset=0.0)],
        labels=LabelsConfig(path=None, crs=CRS),
        chunk=8,
    )
    return region, answers


def test_draw_reads_the_drawn_pixels_and_labels_them(two_tiles):
    region, answers = two_tiles
    stacks = open_region(region)
    n_pixels = 8 * 8 + 8 * 16
    table = draw_rule_labels(stacks, BANDS, n=n_pixels, seed=1)
    assert list(table.columns) == ["tile", "row", "col", "x", "y", "label", "onset_year"]
    assert len(table) == n_pixels  # no abstention here, and every pixel drawn once
    assert not table.duplicated(["tile", "row", "col"]).any()
    got = {(t, r, c): (lab, o) for t, r, c, lab, o in table[["tile", "row", "col", "label", "onset_year"]].itertuples(index=False)}
    assert got == {(t, r, c): v for t, want in answers.items() for (r, c), v in want.items()}
    row = table.iloc[5]
    assert (row.x, row.y) == pixel_centre(int(row.row), int(row.col))
    assert table["row"].dtype == np.int64 and table["onset_year"].dtype == np.int64


def test_draw_is_seeded_proportional_and_skips_excluded(two_tiles):
    region, _ = two_tiles
    stacks = open_region(region)
    a = draw_rule_labels(stacks, BANDS, n=30, seed=7)
    b = draw_rule_labels(stacks, BANDS, n=30, seed=7)
    pd.testing.assert_frame_equal(a, b)
    assert len(a) == 30
    assert not a.equals(draw_rule_labels(stacks, BANDS, n=30, seed=8))
    # Tile b has twice tile a's area: about two thirds of the draws (binomial sd 0.025 over four draws of 90).
    share_b = np.mean([(draw_rule_labels(stacks, BANDS, n=90, seed=s)["tile"] == "b").mean() for s in range(4)])
    assert 0.56 < share_b < 0.77  # ±4 sd
    # Excluded pixels are never drawn, even when the draw asks for every pixel.
    exclude = {("a", r, c) for r in range(8) for c in range(4)} | {("b", 0, 0)}
    allpix = draw_rule_labels(stacks, BANDS, n=10_000, seed=3, exclude=exclude)
    drawn = set(zip(allpix["tile"], allpix["row"], allpix["col"], strict=True))
    assert drawn.isdisjoint(exclude)
    assert len(allpix) == 8 * 4 + 8 * 16 - 1


def test_draw_drops_abstentions_and_handles_nothing_to_draw(two_tiles):
    region, _ = two_tiles
    stacks = open_region(region)
    # A rule that needs more clear dates per year than there are abstains everywhere.
    empty = draw_rule_labels(stacks, BANDS, n=20, seed=0, thresholds=RuleThresholds(min_dates_per_year=3))
    assert len(empty) == 0 and list(empty.columns) == ["tile", "row", "col", "x", "y", "label", "onset_year"]
    assert len(draw_rule_labels(stacks, BANDS, n=0, seed=0)) == 0
    with pytest.raises(ConfigError, match="n"):
        draw_rule_labels(stacks, BANDS, n=-1, seed=0)
