"""Dates of several sensors in one series: the adjustment to a reference sensor, the per-date sensor the readers record, and the network's sensor feature."""

from __future__ import annotations

import numpy as np
import pytest

from plantation.errors import ConfigError, RegionError
from plantation.imagery.config import HarmoniseConfig, RegionConfig, ScalingRule, SensorRule, TileConfig
from plantation.imagery.harmonise import ETM, MSI, OLI, canonical_sensor, coefficients, harmonise
from plantation.imagery.region import open_region, open_tile
from tests.test_products import QA_CLEAR, _region, landsat_scene, s2_product

BANDS = ["blue", "green", "red", "nir", "swir1", "swir2"]


def test_oli_dates_are_unchanged_and_others_move_band_by_band():
    x = np.full((3, 6, 2, 2), 0.2, np.float32)
    out = harmonise(x, [OLI, ETM, MSI], BANDS)
    assert out.dtype == np.float32 and out is not x
    np.testing.assert_array_equal(out[0], x[0])
    # ETM+ nir: 0.8462 · 0.2 + 0.0412 (Roy et al. 2016); MSI red: 0.9765 · 0.2 + 0.0009 (HLS).
    np.testing.assert_allclose(out[1, 3], 0.8462 * 0.2 + 0.0412, rtol=1e-6)
    np.testing.assert_allclose(out[2, 2], 0.9765 * 0.2 + 0.0009, rtol=1e-6)
    np.testing.assert_array_equal(x, np.float32(0.2))  # the input is left alone


def test_bands_without_a_coefficient_pass_through_and_nan_stays_nan():
    bands = ["coastal", "red", "rededge1", "nir_broad"]
    x = np.full((1, 4, 1, 2), 0.3, np.float32)
    x[0, 1, 0, 1] = np.nan
    out = harmonise(x, [ETM], bands)
    np.testing.assert_array_equal(out[0, [0, 2, 3]], x[0, [0, 2, 3]])
    np.testing.assert_allclose(out[0, 1, 0, 0], 0.9047 * 0.3 + 0.0061, rtol=1e-6)
    assert np.isnan(out[0, 1, 0, 1])


def test_sensor_spellings_and_landsat_9_are_canonical():
    assert canonical_sensor("OLI") == canonical_sensor("oli-2") == canonical_sensor("landsat-9") == canonical_sensor("oli+tirs") == OLI
    assert canonical_sensor("etm+") == canonical_sensor("LE07") == ETM
    assert canonical_sensor("Sentinel-2C") == canonical_sensor("msi") == MSI
    assert canonical_sensor(" Spot7 ") == "spot7"
    slope, intercept = coefficients(["landsat-9", "oli"], BANDS)
    assert (slope == 1).all() and (intercept == 0).all()


def test_unknown_unnamed_sensors_and_references_are_refused_in_one_line():
    x = np.zeros((2, 6, 1, 1), np.float32)
    with pytest.raises(RegionError, match=r"date 2: sensor 'spot7' has no published adjustment to landsat_oli") as e:
        harmonise(x, [OLI, "spot7"], BANDS)
    assert "\n" not in str(e.value)
    with pytest.raises(RegionError, match=r"date 1: its sensor is not named.*region.sensors"):
        harmonise(x, ["", OLI], BANDS)
    with pytest.raises(ConfigError, match=r"region.harmonise.reference: 'msi' has no published coefficients"):
        harmonise(x, [OLI, OLI], BANDS, reference="msi")
    with pytest.raises(ValueError, match=r"does not match 3 dates"):
        harmonise(x, [OLI, OLI, OLI], BANDS)


# Readers: the sensor of each date, one sorted series, the adjustment in the lazy and windowed paths.


#: Landsat Collection 2 Level-2 reflectance of a stored DN (USGS product guide).
def _landsat(dn: float) -> float:
    return dn * 0.0000275 - 0.2


def _mixed_folder(root):
    """Scenes of three sensors in one tile folder, out of order by name: ETM+, MSI, OLI, and OLI with MSI on one day."""
    qa = np.full((6, 6), QA_CLEAR, np.uint16)
    cloudy = qa.copy()
    cloudy[0, 0] = QA_CLEAR | 1 << 3  # cloud: a bit flag only the Landsat rule reads
    landsat_scene(root, "20190105", np.full((6, 6), 10000), qa, sensor="LE07")
    landsat_scene(root, "20190121", np.full((6, 6), 10000), cloudy, sensor="LC08")
    landsat_scene(root, "20190301", np.full((6, 6), 12000), qa, sensor="LC09")
    # SCL 5 (not vegetated) is valid by the scene classes; read as Landsat bits it would be fill (bit 0).
    s2_product(root, "20190110T023031", "0213", 1500, 2500, np.full((4, 4), 5))
    s2_product(root, "20190301T023031", "0213", 1700, 2700, np.full((4, 4), 5))


def test_a_product_folder_of_three_sensors_is_one_sorted_harmonised_series_with_each_dates_sensor(tmp_path):
    _mixed_folder(tmp_path)
    region = _region(tmp_path, harmonise=HarmoniseConfig(enabled=True))
    st = open_tile(region.tiles[0], region)
    assert [str(d) for d in st.dates] == ["2019-01-05", "2019-01-10", "2019-01-21", "2019-03-01"]
    # One date per solar day: on 1 March the reference sensor's scene is kept, Sentinel-2's left out.
    assert st.sensors == [ETM, MSI, OLI, OLI]
    refl, valid = st.reflectance.values, st.valid.values
    blue = [_landsat(10000) * 0.8474 + 0.0003, 0.15 * 0.9778 - 0.004, _landsat(10000), _landsat(12000)]
    np.testing.assert_allclose(refl[:, 0, 1, 1], blue, rtol=1e-5)
    # nir: Landsat DN + 300 (fourth band), MSI band 8A at 20 m.
    nir = [_landsat(10300) * 0.8462 + 0.0412, 0.25 * 0.9983 - 0.0001, _landsat(10300), _landsat(12300)]
    np.testing.assert_allclose(refl[:, 3, 1, 1], nir, rtol=1e-5)
    # Each sensor's QA by its own rule.
    assert valid[1, 1, 1] and not valid[2, 0, 0] and valid[2, 1, 1]


def test_harmonisation_off_leaves_a_product_folder_of_several_sensors_refused(tmp_path):
    _mixed_folder(tmp_path)
    region = _region(tmp_path)
    with pytest.raises(RegionError, match=r"several sensors \['landsat_etm', 'landsat_oli', 'sentinel2_msi'\].*region.harmonise.enabled: true") as e:
        open_tile(region.tiles[0], region)
    assert "\n" not in str(e.value)


def test_one_sensor_product_folders_read_as_before_with_or_without_harmonisation(tmp_path):
    landsat_scene(tmp_path, "20190105", np.full((6, 6), 10000), np.full((6, 6), QA_CLEAR, np.uint16))
    plain, harmonised = _region(tmp_path), _region(tmp_path, harmonise=HarmoniseConfig(enabled=True))
    a, b = (open_tile(r.tiles[0], r) for r in (plain, harmonised))
    np.testing.assert_array_equal(a.reflectance.values, b.reflectance.values)
    assert a.sensors == b.sensors == [OLI]


def _rules():
    return [SensorRule(pattern="scene_2015-*", sensor="etm+"), SensorRule(pattern="*", sensor="oli")]


def test_geotiff_folder_sensors_come_from_file_name_rules_and_default_to_one_unnamed_sensor(make_region):
    region = make_region()
    assert open_tile(region.tiles[0], region).sensors == [""] * 5
    region = make_region(sensors=_rules())
    assert open_tile(region.tiles[0], region).sensors == [ETM, ETM, OLI, OLI, OLI]
    region = make_region(sensors=[SensorRule(pattern="scene_2016-*", sensor="oli")])
    with pytest.raises(RegionError, match=r"scene_2015-02-14.tif matches no region.sensors pattern \['scene_2016-\*'\]"):
        open_tile(region.tiles[0], region)
    region = make_region(sensors=[SensorRule(pattern="*", sensor="")])
    with pytest.raises(ConfigError, match=r"region.sensors\[0\]: no sensor named"):
        open_tile(region.tiles[0], region)


def test_geotiff_folder_harmonised_lazy_and_windowed_reads_agree_and_equal_the_pure_function(make_region, tiny_values):
    qa = np.zeros((5, 8, 8), np.int16)
    qa[0, 2, 3] = 1  # cloud on an ETM+ date
    rules = [ScalingRule(start=None, scale=1e-4, offset=0.0), ScalingRule(start="2016-01-01", scale=1e-4, offset=-0.1)]
    vals = tiny_values.copy()
    vals[2:] += 1000
    plain = open_tile((r := make_region(values=vals, qa=qa, scaling=rules, sensors=_rules())).tiles[0], r)
    region = make_region(values=vals, qa=qa, scaling=rules, sensors=_rules(), harmonise=HarmoniseConfig(enabled=True, reference="OLI"))
    st = open_tile(region.tiles[0], region)
    assert st.reader is not None
    lazy = st.reflectance.values
    for r0, c0, h, w in [(0, 0, 8, 8), (1, 2, 5, 3), (7, 7, 1, 1)]:
        refl, valid = st.read(r0, c0, h, w)
        np.testing.assert_array_equal(refl, lazy[:, :, r0 : r0 + h, c0 : c0 + w])
        np.testing.assert_array_equal(valid, st.valid.values[:, r0 : r0 + h, c0 : c0 + w])
    want = harmonise(plain.reflectance.values, plain.sensors, BANDS)
    np.testing.assert_allclose(lazy, want, rtol=1e-6, equal_nan=True)
    assert np.isnan(lazy[0, :, 2, 3]).all()
    np.testing.assert_array_equal(lazy[2:], plain.reflectance.values[2:])  # OLI dates untouched
    assert not np.allclose(lazy[:2], plain.reflectance.values[:2])


def test_harmonising_an_unnamed_sensor_is_refused_naming_the_key(make_region):
    region = make_region(harmonise=HarmoniseConfig(enabled=True))
    with pytest.raises(RegionError, match=r"date 1: its sensor is not named.*region.sensors"):
        open_tile(region.tiles[0], region)


def test_a_cube_takes_each_dates_sensor_from_its_sensor_coordinate(tmp_path, tiny_values):
    import rioxarray  # noqa: F401
    import xarray as xr

    from tests.conftest import BANDS as CUBE_BANDS
    from tests.conftest import CRS, DATES, TRANSFORM

    da = xr.DataArray(
        tiny_values,
        dims=("time", "band", "y", "x"),
        coords={"time": np.array(DATES, dtype="datetime64[ns]"), "band": CUBE_BANDS, "sensor": ("time", ["LE07", "LE07", "msi", "oli", "oli"])},
    )
    da = da.rio.write_crs(CRS).rio.write_transform(TRANSFORM)
    da = da.assign_coords(x=TRANSFORM.c + 30.0 * (np.arange(8) + 0.5), y=TRANSFORM.f - 30.0 * (np.arange(8) + 0.5))
    path = tmp_path / "cube.nc"
    da.to_dataset(name="reflectance").to_netcdf(path)
    region = RegionConfig(name="c", format="cube", tiles=[TileConfig(name="t1", path=str(path))], bands=BANDS, scaling=[ScalingRule(scale=1e-4)], chunk=4, harmonise=HarmoniseConfig(enabled=True))
    st = open_tile(region.tiles[0], region)
    assert st.sensors == [ETM, ETM, MSI, OLI, OLI]
    np.testing.assert_allclose(st.reflectance.values[2, 2], (tiny_values[2, 2] * 1e-4) * 0.9765 + 0.0009, rtol=1e-5)


def test_tiles_with_other_sensors_on_a_date_are_refused(make_region, tmp_path):
    from tests.conftest import DATES, write_stack

    other = write_stack(tmp_path / "t2", DATES, np.full((5, 6, 8, 8), 500, np.int16), np.zeros((5, 8, 8), np.int16))
    (other / f"scene_{DATES[0]}.tif").rename(other / f"etm_scene_{DATES[0]}.tif")
    region = make_region(sensors=[SensorRule(pattern="etm_*", sensor="etm"), SensorRule(pattern="*", sensor="oli")])
    region.tiles.append(TileConfig(name="t2", path=str(other)))
    with pytest.raises(RegionError, match=r"t2: date 2015-02-14 is landsat_etm, tile 't1''s is landsat_oli; all tiles need the same sensor on each date"):
        open_region(region)


# The network's sensor feature, the card's sensors and the refusal of foreign sensors.

#: A small network; the figures below were measured on the network as it was
#: before sensors existed (same seed and inputs, torch 2.13 on CPU): the
#: single-sensor network must stay exactly that one.
NET = {
    "n_channels": 10,
    "date_year": [0, 0, 0, 1, 1, 2, 2, 2],
    "day_of_year": [0.1, 0.4, 0.8, 0.2, 0.6, 0.05, 0.5, 0.9],
    "neighbourhood": 3,
    "date_width": 8,
    "conv_width": 8,
    "hidden": 8,
    "amplitude": True,
}
BEFORE_PARAMETERS = 4780
BEFORE_FIRST_LOGITS = [0.09246186912059784, -0.0926927998661995, 0.21626879274845123, -0.0007829917594790459]
BEFORE_SUM = 0.8429152369499207


def _net_outputs(**kw):
    import torch

    from plantation.model.network import ConvRecurrentNet

    torch.manual_seed(7)
    net = ConvRecurrentNet(**(NET | kw)).eval()
    g = torch.Generator().manual_seed(3)
    x = torch.rand(4, 8, 10, 3, 3, generator=g)
    v = torch.rand(4, 8, 3, 3, generator=g) > 0.3
    with torch.no_grad():
        return net, net(x, v)


def test_a_single_sensor_network_is_the_network_built_before_sensors_existed():
    for kw in ({}, {"n_sensors": 1, "date_sensor": [0] * 8}):
        net, out = _net_outputs(**kw)
        assert sum(p.numel() for p in net.parameters()) == BEFORE_PARAMETERS
        assert "sensor" not in net.state_dict()
        np.testing.assert_allclose(out[0, :4].numpy(), BEFORE_FIRST_LOGITS, rtol=1e-6, atol=1e-7)
        assert float(out.sum()) == pytest.approx(BEFORE_SUM, abs=1e-5)


def test_with_two_sensors_each_date_embedding_reads_a_one_hot_of_its_sensor():
    net, out = _net_outputs(n_sensors=2, date_sensor=[0, 0, 1, 1, 0, 1, 0, 1])
    assert sum(p.numel() for p in net.parameters()) == BEFORE_PARAMETERS + NET["date_width"] * 2
    np.testing.assert_array_equal(net.state_dict()["sensor"].numpy()[:3], [[1, 0], [1, 0], [0, 1]])
    _, other = _net_outputs(n_sensors=2, date_sensor=[1, 1, 0, 0, 1, 0, 1, 0])
    assert not np.allclose(out.numpy(), other.numpy())
    with pytest.raises(ValueError, match=r"date_sensor must give each of the 8 dates a sensor index in \[0, 2\)"):
        _net_outputs(n_sensors=2, date_sensor=[0, 2, 0, 0, 0, 0, 0, 0])
    with pytest.raises(ValueError, match="date_sensor must give"):
        _net_outputs(n_sensors=2)


def test_the_network_spec_gains_sensor_inputs_only_with_more_than_one_sensor():
    from dataclasses import replace

    from plantation.model.training import TrainConfig, network_spec, trained_sensors
    from tests.test_splits import tiny_patches

    ps = tiny_patches(8, years=(2015, 2016, 2017))
    ps.split[:] = 0
    one = replace(ps, sensors=(OLI, OLI, OLI))
    spec = network_spec(one, TrainConfig())
    assert "n_sensors" not in spec and "date_sensor" not in spec and trained_sensors(one) == [OLI]
    two = replace(ps, sensors=(ETM, OLI, MSI))
    spec = network_spec(two, TrainConfig())
    assert trained_sensors(two) == [ETM, OLI, MSI] and spec["n_sensors"] == 3 and spec["date_sensor"] == [0, 1, 2]
    assert network_spec(ps, TrainConfig()).keys() == network_spec(one, TrainConfig()).keys()  # sensors unknown: as one sensor


def test_patches_carry_each_dates_sensor_through_subset_and_concat():
    from dataclasses import replace

    from tests.test_splits import tiny_patches

    a = replace(tiny_patches(3), sensors=(ETM, OLI))
    assert a.subset(np.array([0, 2])).sensors == (ETM, OLI)
    assert a.concat(tiny_patches(2, start=3)).sensors == (ETM, OLI)
    with pytest.raises(ValueError, match="the sensors of the dates differ"):
        a.concat(replace(tiny_patches(2, start=3), sensors=(OLI, OLI)))


def test_cards_record_sensors_and_cards_written_before_them_still_read(tmp_path):
    import json

    from plantation.model.card import FORMAT, read_card, write_card
    from tests.test_artefact import _card

    card = _card(1)
    card.sensors = [ETM, OLI]
    write_card(tmp_path / "new", card)
    assert read_card(tmp_path / "new").sensors == [ETM, OLI]
    old = json.loads((tmp_path / "new" / "model.json").read_text())
    del old["sensors"]
    (tmp_path / "old").mkdir()
    (tmp_path / "old" / "model.json").write_text(json.dumps(old))
    back = read_card(tmp_path / "old")
    assert back.sensors == [] and back.format == FORMAT


def _artefact_for(card_sensors, spec_extra=None):
    import torch

    from plantation.model import artefact
    from plantation.model.network import ConvRecurrentNet
    from tests.conftest import DATES
    from tests.test_artefact import SPEC, _card

    spec = SPEC | {"n_channels": 10, "date_year": [0, 0, 1, 1, 2], "day_of_year": [0.1, 0.6, 0.1, 0.6, 0.6]} | (spec_extra or {})
    card = _card(1)
    card.network, card.bands, card.indices, card.dates, card.years = spec, BANDS, ["NDVI", "EVI", "NBR", "NDMI"], DATES, [2015, 2016, 2017]
    card.sensors = card_sensors
    torch.manual_seed(0)
    return artefact.Artefact(card, [ConvRecurrentNet(**spec).eval()])


def test_the_artefact_refuses_a_region_of_sensors_it_was_not_trained_on(make_region):
    from plantation.model.inference import check_compatible

    oli_only = make_region(sensors=[SensorRule(pattern="*", sensor="oli")])
    mixed = make_region(sensors=[SensorRule(pattern="scene_2015-*", sensor="msi"), SensorRule(pattern="*", sensor="oli")])
    unnamed = make_region()
    stack = open_tile(oli_only.tiles[0], oli_only)
    check_compatible(_artefact_for([OLI]), stack)
    check_compatible(_artefact_for([]), stack)  # a card from before sensors were recorded: nothing to check
    with pytest.raises(RegionError, match=r"tile 't1': sensor\(s\) \[sentinel2_msi\] are not among the model's \[landsat_oli\]") as e:
        check_compatible(_artefact_for([OLI]), open_tile(mixed.tiles[0], mixed))
    assert "\n" not in str(e.value)
    with pytest.raises(RegionError, match=r"sensor\(s\) \[unnamed\] are not among the model's \[landsat_etm, landsat_oli\]"):
        check_compatible(_artefact_for([ETM, OLI]), open_tile(unnamed.tiles[0], unnamed))
    with pytest.raises(RegionError, match=r"sensor\(s\) \[landsat_oli\] are not among the model's \[unnamed\]"):
        check_compatible(_artefact_for([""]), stack)
    # A two-sensor model reads each date's sensor: the same sensors on other dates are refused too.
    two = _artefact_for([OLI, MSI], {"n_sensors": 2, "date_sensor": [1, 1, 0, 0, 0]})
    check_compatible(two, open_tile(mixed.tiles[0], mixed))
    swapped = make_region(sensors=[SensorRule(pattern="scene_2017-*", sensor="msi"), SensorRule(pattern="*", sensor="oli")])
    swapped_stack = open_tile(swapped.tiles[0], swapped)
    with pytest.raises(RegionError, match=r"tile 't1': date 2015-02-14 is landsat_oli, the model was trained with sentinel2_msi on that date"):
        check_compatible(two, swapped_stack)


def test_the_weights_of_a_single_sensor_parent_do_not_carry_into_a_two_sensor_network():
    from plantation.errors import ConfigError as CE
    from plantation.model.transfer import transfer_spec

    parent = NET | {"mean": [0.0] * 10, "std": [1.0] * 10}
    with pytest.raises(CE, match=r"n_sensors None in the parent, 2 now"):
        transfer_spec(parent, parent | {"n_sensors": 2, "date_sensor": [0, 1] * 4}, parent_years=[2015, 2016, 2017], child_years=[2015, 2016, 2017])


def test_the_artefact_refuses_imagery_harmonised_otherwise_than_its_training_imagery(make_region):
    from plantation.model.inference import check_compatible

    rules = [SensorRule(pattern="*", sensor="oli")]
    plain = open_tile((r := make_region(sensors=rules)).tiles[0], r)
    adjusted = open_tile((r := make_region(sensors=rules, harmonise=HarmoniseConfig(enabled=True))).tiles[0], r)
    assert (plain.harmonised_to, adjusted.harmonised_to) == ("", OLI)
    art = _artefact_for([OLI])
    art.card.harmonised_to = OLI
    check_compatible(art, adjusted)
    with pytest.raises(RegionError, match=r"tile 't1': the imagery is read as stored \(region.harmonise off\), the model's was read adjusted to landsat_oli; set region.harmonise"):
        check_compatible(art, plain)
    art.card.harmonised_to = None  # a card from before it was recorded
    check_compatible(art, plain)
