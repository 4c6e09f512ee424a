"""Fire in the clearing: burn indices, severity classes, per-pixel attribution, escaped fire.

Sources: spyndex (Awesome Spectral Indices, Montero et al. 2023, Scientific
Data 10:197) for the formulas of NBR (Key & Benson 2006), MIRBI (Trigg &
Flasse 2001) and BAI (Chuvieco et al. 2002); the severity classes of Key &
Benson (2006, FIREMON) on dNBR × 1000 as tabulated in the project's check
values (< −100 enhanced regrowth; −100 to 99 unburned; 100–269 low; 270–439
moderate-low; 440–659 moderate-high; ≥ 660 high). The attribution is scored
against the simulator's truth (which clearings it charred, which forest it
burnt from an escaped clearing fire), not against this module's own output.
"""

from __future__ import annotations

from dataclasses import replace
from pathlib import Path

import numpy as np
import pytest
import rasterio

from plantation.imagery import burn
from plantation.mapping.fire import FIRE_CODES, FireRule, attribute, resolve_escaped
from plantation.simulation.scenario import FIRE_TRUTH

ROOT = Path(__file__).resolve().parents[1]
BANDS = ["blue", "green", "red", "nir", "swir1", "swir2"]
#: Band reflectance (blue … swir2) of closed forest, charred ground just after a fire and bare soil after a clearing by machines, from the simulator's PROSAIL table.
FOREST = np.array([0.017, 0.036, 0.016, 0.400, 0.162, 0.052])
CHAR = np.array([0.040, 0.049, 0.055, 0.099, 0.116, 0.099])
BARE = np.array([0.118, 0.140, 0.161, 0.258, 0.323, 0.286])


# --------------------------------------------------------------------------- indices against spyndex


@pytest.mark.parametrize("seed", [0, 1, 2023])
def test_burn_indices_match_spyndex(seed):
    spyndex = pytest.importorskip("spyndex")
    rng = np.random.default_rng(seed)
    red, nir, s1, s2 = (rng.uniform(0.01, 0.6, 5000) for _ in range(4))
    np.testing.assert_allclose(burn.mirbi(s1, s2), np.asarray(spyndex.computeIndex(index="MIRBI", params={"S1": s1, "S2": s2})), rtol=1e-6)
    np.testing.assert_allclose(burn.bai(red, nir), np.asarray(spyndex.computeIndex(index="BAI", params={"R": red, "N": nir})), rtol=1e-6)
    # dNBR is the difference of two NBRs (before minus after).
    nir2, s22 = rng.uniform(0.01, 0.6, 5000), rng.uniform(0.01, 0.6, 5000)
    before = np.asarray(spyndex.computeIndex(index="NBR", params={"N": nir, "S2": s2}))
    after = np.asarray(spyndex.computeIndex(index="NBR", params={"N": nir2, "S2": s22}))
    np.testing.assert_allclose(burn.dnbr(nir, s2, nir2, s22), before - after, rtol=1e-6, atol=1e-12)


def test_burn_indices_tell_char_from_bare_soil():
    """Both clearings drop NBR alike; BAI is what parts char from bare soil."""
    d_char = burn.dnbr(FOREST[3], FOREST[5], CHAR[3], CHAR[5])
    d_bare = burn.dnbr(FOREST[3], FOREST[5], BARE[3], BARE[5])
    assert d_char > 0.66 and d_bare > 0.66  # both "high" severity by dNBR alone
    assert burn.bai(CHAR[2], CHAR[3]) > 5 * burn.bai(BARE[2], BARE[3])
    assert burn.mirbi(CHAR[4], CHAR[5]) > burn.mirbi(FOREST[4], FOREST[5])


@pytest.mark.parametrize(
    ("dnbr_x1000", "name"),
    [
        (-500, "enhanced regrowth"),
        (-101, "enhanced regrowth"),
        (-100, "unburned"),
        (99, "unburned"),
        (100, "low"),
        (269, "low"),
        (270, "moderate-low"),
        (439, "moderate-low"),
        (440, "moderate-high"),
        (659, "moderate-high"),
        (660, "high"),
        (1300, "high"),
    ],
)
def test_severity_classes_of_key_and_benson(dnbr_x1000, name):
    assert burn.severity_class(np.array([dnbr_x1000 / 1000.0]))[0] == burn.SEVERITY[name]


def test_severity_class_of_nan_is_zero():
    assert burn.severity_class(np.array([np.nan, 0.5])).tolist() == [0, burn.SEVERITY["moderate-high"]]


# --------------------------------------------------------------------------- attribution on a known series


def _series(states: list[np.ndarray | None]) -> tuple[np.ndarray, np.ndarray]:
    """One pixel's series: (time, band, 1, 1) reflectance and (time, 1, 1) validity; None is a cloudy date."""
    refl = np.stack([np.full(6, np.nan) if s is None else s for s in states]).astype(np.float32)[:, :, None, None]
    return refl, np.array([s is not None for s in states])[:, None, None]


# Quarterly dates over 2018-2020.
T = np.array([y + q for y in (2018, 2019, 2020) for q in (0.12, 0.37, 0.62, 0.87)])


@pytest.mark.parametrize(
    ("states", "expected"),
    [
        # Burnt in mid-2019, seen charred at the next view.
        ([FOREST] * 6 + [CHAR] + [BARE] * 5, "converted_burnt"),
        # Cleared by machines, bare soil seen at the next view.
        ([FOREST] * 6 + [BARE] * 6, "converted_not_burnt"),
        # Bare soil, but the first clear view after came 9 months after the last one before: char could have faded.
        ([FOREST] * 4 + [None, None, None] + [BARE] * 5, "converted_unknown"),
        # Char seen late is still char.
        ([FOREST] * 4 + [None, None, None] + [CHAR] + [BARE] * 4, "converted_burnt"),
        # No clear view after the onset at all.
        ([FOREST] * 5 + [None] * 7, "converted_unknown"),
    ],
)
def test_attribution_of_one_clearing(states, expected):
    refl, valid = _series(states)
    out = attribute(refl, valid, T, BANDS, np.array([[True]]), np.array([[2019]]))
    assert out.code[0, 0] == FIRE_CODES[expected]
    assert out.year[0, 0] == (2019 if expected == "converted_burnt" else 0)
    if expected != "converted_unknown" or np.isfinite(out.dnbr[0, 0]):
        assert out.dnbr[0, 0] == pytest.approx(burn.dnbr(FOREST[3], FOREST[5], states[7][3] if states[6] is None else states[6][3], states[7][5] if states[6] is None else states[6][5]), abs=1e-5)


def test_max_gap_decides_between_unknown_and_no_fire():
    refl, valid = _series([FOREST] * 4 + [None, None, None] + [BARE] * 5)
    args = (refl, valid, T, BANDS, np.array([[True]]), np.array([[2019]]))
    assert attribute(*args).code[0, 0] == FIRE_CODES["converted_unknown"]
    assert attribute(*args, FireRule(max_gap_years=1.0)).code[0, 0] == FIRE_CODES["converted_not_burnt"]


def test_without_swir_bands_every_clearing_is_unknown():
    refl, valid = _series([FOREST] * 6 + [CHAR] + [BARE] * 5)
    out = attribute(refl[:, :4], valid, T, BANDS[:4], np.array([[True]]), np.array([[2019]]))
    assert out.code[0, 0] == FIRE_CODES["converted_unknown"]


def test_canopy_loss_in_forest_is_a_candidate_only_where_mapped_forest():
    refl, valid = _series([FOREST] * 6 + [CHAR] + [FOREST] * 5)
    out = attribute(refl, valid, T, BANDS, np.array([[False]]), np.array([[0]]), forest=np.array([[True]]))
    assert out.code[0, 0] == FIRE_CODES["none"] and out.candidate_year[0, 0] == 2019
    assert attribute(refl, valid, T, BANDS, np.array([[False]]), np.array([[0]]), forest=np.array([[False]])).candidate_year[0, 0] == 0
    # Seasonal wobble of a forest is no canopy loss.
    refl, valid = _series([FOREST, FOREST * 0.95 + 0.005] * 6)
    assert attribute(refl, valid, T, BANDS, np.array([[False]]), np.array([[0]])).candidate_year[0, 0] == 0


def test_escaped_fire_needs_a_burnt_clearing_near_and_in_its_season():
    code = np.zeros((12, 12), np.int16)
    year = np.zeros((12, 12), np.int16)
    code[2:5, 2:5], year[2:5, 2:5] = FIRE_CODES["converted_burnt"], 2019
    code[2:5, 8:11] = FIRE_CODES["converted_not_burnt"]
    cand = np.zeros((12, 12), np.int16)
    cand[5, 3] = 2019  # beside the burnt clearing
    cand[5, 4] = 2022  # beside it, years later
    cand[11, 11] = 2019  # far from it
    cand[5, 9] = 2019  # beside the clearing made without fire
    code[8:10, 2:4] = FIRE_CODES["converted_unknown"]  # fire unknown: its neighbours may still have burnt
    cand[10, 2] = 2020
    onset = np.where(code > 0, 2019, 0)
    new_code, new_year = resolve_escaped(code, year, cand, onset, FireRule(escape_px=2))
    assert new_code[5, 3] == FIRE_CODES["escaped_fire"] and new_year[5, 3] == 2019
    assert new_code[5, 4] == new_code[11, 11] == new_code[5, 9] == FIRE_CODES["none"]
    assert new_code[10, 2] == FIRE_CODES["escaped_fire"] and new_year[10, 2] == 2020
    assert (new_code[2:5, 2:5] == FIRE_CODES["converted_burnt"]).all()


# --------------------------------------------------------------------------- against the simulator's truth


def _toy_region():
    """The demo region's reading rules (configs/region/toy.yaml), as the mapping job reads them."""
    from plantation.cli.compose import load_region_file
    from plantation.config import to_object
    from plantation.imagery.config import RegionConfig

    return to_object(load_region_file(ROOT / "configs" / "region" / "toy.yaml"), RegionConfig)


def _toy_truth_run(folder: Path, rule: FireRule | None = None) -> dict[str, int]:
    """Attribution over a simulated region with the truth's class and onset as the mapped ones: counts of agreement with its fire band."""
    from plantation.imagery.config import TileConfig
    from plantation.imagery.region import open_tile
    from plantation.model.inference import read_window
    from plantation.simulation.scenario import decimal_year

    region = _toy_region()
    rule = rule or FireRule()
    counts: dict[str, int] = {}
    for tile_dir in sorted(p for p in folder.iterdir() if (p / "truth.tif").is_file()):
        tile = TileConfig(name=tile_dir.name, path=str(tile_dir / "imagery"), truth=str(tile_dir / "truth.tif"))
        st = open_tile(tile, replace(region, tiles=[tile]))
        refl, valid = read_window(st, 0, 0, st.grid.height, st.grid.width, 0)
        t = np.array([decimal_year(d.astype("datetime64[D]").item()) for d in st.dates])
        with rasterio.open(tile.truth) as src:
            cls, onset, event_year, fire = src.read(1), src.read(2), src.read(4), src.read(6)
        fw = attribute(refl, valid, t, list(region.bands), cls == 2, onset, rule, forest=cls == 1)
        code, year = resolve_escaped(fw.code, fw.year, fw.candidate_year, onset, rule)
        conv = cls == 2
        known = conv & np.isin(code, (FIRE_CODES["converted_burnt"], FIRE_CODES["converted_not_burnt"]))
        burnt = fire == FIRE_TRUTH["clearing_burnt"]
        esc = code == FIRE_CODES["escaped_fire"]
        for k, v in {
            "converted": conv.sum(),
            "known": known.sum(),
            "tp": (known & burnt & (code == FIRE_CODES["converted_burnt"])).sum(),
            "pos": (known & burnt).sum(),
            "tn": (known & ~burnt & (code == FIRE_CODES["converted_not_burnt"])).sum(),
            "neg": (known & ~burnt).sum(),
            "escaped_mapped": esc.sum(),
            "escaped_true": (fire == FIRE_TRUTH["escaped_fire"]).sum(),
            "escaped_hit_year": (esc & (fire == FIRE_TRUTH["escaped_fire"]) & (year == event_year)).sum(),
        }.items():
            counts[k] = counts.get(k, 0) + int(v)
    return counts


def test_attribution_against_the_toy_regions_truth():
    """On the demo region's own clearings (truth class and onset as the map), burnt vs not burnt is told apart well above chance."""
    c = _toy_truth_run(ROOT / "toy_tiles")
    balanced = (c["tp"] / c["pos"] + c["tn"] / c["neg"]) / 2
    assert c["pos"] > 1000 and c["neg"] > 300
    assert balanced >= 0.9, c
    # Clouds leave many clearings without a close view: they must be unknown, not "no fire".
    assert 0.2 < c["known"] / c["converted"] < 0.9, c


@pytest.mark.slow
def test_escaped_fire_against_a_simulated_regions_truth(tmp_path):
    """A small simulated region whose burnt clearings all let fire escape: mapped escaped-fire area near the true one."""
    from plantation.simulation.scenario import SimulationConfig
    from plantation.simulation.writer import write_region

    cfg = SimulationConfig(name="fire_test", seed=4242, tiles_x=1, tiles_y=1, tile_size=160, estates_per_100km2=20.0, holdings_per_100km2=300.0, escaped_fire_share=1.0, n_labels=200, block=160)
    write_region(cfg, tmp_path / "r", progress=False)
    c = _toy_truth_run(tmp_path / "r")
    assert c["escaped_true"] > 100, c
    assert 0.6 <= c["escaped_mapped"] / c["escaped_true"] <= 1.4, c
    assert c["escaped_hit_year"] >= 0.5 * c["escaped_mapped"], c


def test_fire_scores_by_hand():
    """Balanced accuracy over observed clearings only (unknown apart, mapped-not-converted apart); escaped area ratio, precision and year."""
    from plantation.benchmarks.scores import fire_scores

    F, T = FIRE_CODES, FIRE_TRUTH
    #        burnt TP, burnt FN, not-burnt TN, not-burnt FP, unknown, truly not converted, escaped hit (right year), escaped hit (wrong year), escaped false, escaped missed
    label = np.array([2, 2, 2, 2, 2, 2, 1, 1, 1, 1])
    code = np.array(
        [F["converted_burnt"], F["converted_not_burnt"], F["converted_not_burnt"], F["converted_burnt"], F["converted_unknown"], F["converted_burnt"]] + [F["escaped_fire"]] * 3 + [F["none"]]
    )
    year = np.array([2019, 0, 0, 2019, 0, 2019, 2019, 2020, 2019, 0])
    true_label = np.array([2, 2, 2, 2, 2, 4, 1, 1, 1, 1])
    true_fire = np.array(
        [T["clearing_burnt"], T["clearing_burnt"], T["clearing_not_burnt"], T["clearing_not_burnt"], T["clearing_burnt"], T["other_clearing_burnt"]]
        + [T["escaped_fire"], T["escaped_fire"], T["none"], T["escaped_fire"]]
    )
    true_year = np.array([2019, 2019, 2019, 2019, 2019, 2019, 2019, 2019, 0, 2019])
    s = fire_scores(label, code, year, true_label, true_fire, true_year)
    assert s["observed_clearings"] == 4 and s["observed_burnt"] == 2 and s["observed_not_burnt"] == 2
    assert s["burnt_recall"] == 0.5 and s["not_burnt_recall"] == 0.5 and s["fire_balanced_accuracy"] == 0.5
    assert s["known_share"] == 0.8  # 4 of the 5 true clearings mapped as converted
    assert s["escaped_fire_pixels"] == {"mapped": 3, "true": 3} and s["escaped_fire_area_ratio"] == 1.0
    assert s["escaped_fire_precision"] == round(2 / 3, 4) and s["escaped_fire_year_exact"] == 0.5


def test_decimal_years_agree_with_the_simulators_dates():
    """The attribution's date clock is the simulator's (noon of the day, leap years counted)."""
    from datetime import date

    from plantation.mapping.fire import decimal_years
    from plantation.simulation.scenario import decimal_year

    days = [date(2019, 2, 14), date(2020, 12, 31), date(2020, 2, 29), date(2013, 1, 1)]
    np.testing.assert_allclose(decimal_years(np.array(days, dtype="datetime64[ns]")), [decimal_year(d) for d in days], rtol=0, atol=1e-12)
