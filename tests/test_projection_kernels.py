"""A 3 x 4 grid projected through the CLI and checked cell by cell against hand computation.

The model is written by hand (model-file schema version 1) with chosen coefficients, so every
expected value below follows from the documented formulas alone:

- linear basis:    eta = b0 + b1 * z,              z = (x - center) / scale
- quadratic basis: eta = b0 + b1 * z + b2 * z**2
- outside = "hold": x is clipped to the observed range before z is formed
- transform "none": a factor's ceiling is max(eta, 0)
- law of the minimum: ceiling = min over factors; the limiting factor is the one attaining it;
  ties go to the lowest unclipped eta, then to the first factor (kernels.combine_minimum)
- change = future - present; change_pct = 100 * change / present where present > 0, else NaN
- zone (kernels.zone_kernel docstring): both > 0: release if change > max(rel * present, floor),
  constraint if change < -max(con * present, floor), else stable; opens (0 -> >0),
  closes (>0 -> 0), absent (0 -> 0); nodata 255
- switch = present_code * K + future_code (K = 2 here); 255 where either is nodata
"""

from __future__ import annotations

import math

import netCDF4
import numpy as np
import pandas as pd
import pytest
from projection_helpers import (
    NODATA,
    assert_refused,
    cli,
    config_text,
    factor_entry,
    geod_cell_area,
    model_document,
    read_code,
    read_float,
    write_json,
    write_survey,
    write_tif,
)

NAN = math.nan
WEST, NORTH, CELL = 20.0, 13.0, 1.0  # rows: 12-13 N, 11-12 N, 10-11 N; columns: 20-24 E

# Factor "temp" (degC): linear, center 10, scale 10, b = (40, -20), observed 0..30
#   eta_T = 40 - 20 (T - 10) / 10 = 60 - 2 T   (T clipped to 0..30 first)
# Factor "rain" (mm year-1): quadratic, center 1000, scale 500, b = (50, 0, -50), observed 400..1600
#   eta_R = 50 - 50 ((R - 1000) / 500)^2
TEMP = factor_entry("temp", "linear", 10.0, 10.0, [40.0, -20.0], (0.0, 30.0), "degC", peak=60.0)
RAIN = factor_entry("rain", "quadratic", 1000.0, 500.0, [50.0, 0.0, -50.0], (400.0, 1600.0), "mm year-1", peak=50.0)

# (T, R) per cell, present and future. Cell (1, 2) is nodata in every layer (a sea cell);
# cell (2, 1) lacks rain in the future only.
P_T = [[11.25, 25.0, 10.0, 30.0], [5.0, 35.0, NAN, 29.5], [10.0, 20.0, 20.0, 10.0]]
P_R = [[1250.0, 1250.0, 1000.0, 1000.0], [1250.0, 1525.0, NAN, 1000.0], [1250.0, 1000.0, 1000.0, 1000.0]]
F_T = [[11.5, 15.0, 10.0, 25.0], [5.0, 35.0, NAN, 29.125], [20.0, 20.0, 19.0, 12.0]]
F_R = [[1250.0, 1250.0, 1375.0, 1000.0], [1600.0, 1525.0, NAN, 1000.0], [1250.0, NAN, 1000.0, 1000.0]]

# Hand computation, cell by cell (eta_T, eta_R -> ceiling, code):
# present
#  (0,0) T=11.25: 60-22.5=37.5; R=1250: z=.5, 50-12.5=37.5   -> 37.5, tie, equal etas -> first: 0
#  (0,1) T=25: 10;               R=1250: 37.5                 -> 10,   0
#  (0,2) T=10: 40;               R=1000: 50                   -> 40,   0
#  (0,3) T=30: 0;                R=1000: 50                   -> 0,    0
#  (1,0) T=5: 50;                R=1250: 37.5                 -> 37.5, 1
#  (1,1) T=35 held at 30: eta 0; R=1525: z=1.05, 50-55.125=-5.125 -> 0; tie at 0, lower eta: rain 1
#        (without the hold, eta_T = -10 would make temp the limit: this cell tests the hold)
#  (1,2) nodata                                               -> NaN, 255
#  (1,3) T=29.5: 1;              R=1000: 50                   -> 1,    0
#  (2,0) T=10: 40;               R=1250: 37.5                 -> 37.5, 1
#  (2,1) T=20: 20;               R=1000: 50                   -> 20,   0
#  (2,2) T=20: 20                                             -> 20,   0
#  (2,3) T=10: 40                                             -> 40,   0
P_CEIL = [[37.5, 10.0, 40.0, 0.0], [37.5, 0.0, NAN, 1.0], [37.5, 20.0, 20.0, 40.0]]
P_CODE = [[0, 0, 0, 0], [1, 1, 255, 0], [1, 0, 0, 0]]
# future
#  (0,0) T=11.5: 37;    R=1250: 37.5          -> 37,     0
#  (0,1) T=15: 30;      R=1250: 37.5          -> 30,     0
#  (0,2) T=10: 40;      R=1375: z=.75, 50-28.125=21.875 -> 21.875, 1
#  (0,3) T=25: 10;      R=1000: 50            -> 10,     0
#  (1,0) T=5: 50;       R=1600: z=1.2, 50-72=-22 -> 0,   1
#  (1,1) as present                           -> 0,      1
#  (1,3) T=29.125: 60-58.25=1.75              -> 1.75,   0
#  (2,0) T=20: 20;      R=1250: 37.5          -> 20,     0
#  (2,1) R nodata                             -> NaN,    255
#  (2,2) T=19: 22                             -> 22,     0
#  (2,3) T=12: 36                             -> 36,     0
F_CEIL = [[37.0, 30.0, 21.875, 10.0], [0.0, 0.0, NAN, 1.75], [20.0, NAN, 22.0, 36.0]]
F_CODE = [[0, 0, 1, 0], [1, 1, 255, 0], [0, 255, 0, 0]]
# change = F - P; change_pct = 100 * change / P where P > 0
CHANGE = [[-0.5, 20.0, -18.125, 10.0], [-37.5, 0.0, NAN, 0.75], [-17.5, NAN, 2.0, -4.0]]
PCT = [[100 * -0.5 / 37.5, 200.0, 100 * -18.125 / 40, NAN], [-100.0, NAN, NAN, 75.0],
       [100 * -17.5 / 37.5, NAN, 10.0, -10.0]]
# zones with rel = con = 0.10 and floor = 1.0 (0 stable, 1 release, 2 constraint, 3 opens,
# 4 closes, 5 absent):
#  (0,0) -0.5  vs -max(3.75, 1) = -3.75  -> stable
#  (0,1) +20   vs  max(1.0, 1)  = 1      -> release
#  (0,2) -18.125 vs -max(4, 1) = -4      -> constraint
#  (0,3) 0 -> 10                         -> opens
#  (1,0) 37.5 -> 0                       -> closes
#  (1,1) 0 -> 0                          -> absent
#  (1,3) +0.75 vs max(0.1, 1) = 1        -> stable (the floor decides)
#  (2,0) -17.5 vs -3.75                  -> constraint
#  (2,2) +2.0 vs max(2.0, 1) = 2.0       -> stable (not strictly above)
#  (2,3) -4.0 vs -max(4.0, 1) = -4.0     -> stable (not strictly below)
ZONE = [[0, 1, 2, 3], [4, 5, 255, 0], [2, 255, 0, 0]]
# switch = present * 2 + future
SWITCH = [[0, 0, 1, 0], [3, 3, 255, 0], [2, 255, 0, 0]]


def _grid(rows) -> np.ndarray:
    return np.array(rows, dtype=np.float64)


@pytest.fixture(scope="module")
def hand_case(tmp_path_factory):
    root = tmp_path_factory.mktemp("hand")
    data = root / "data"
    kw = dict(west=WEST, north=NORTH, cell=CELL, nodata=NODATA)
    write_tif(data / "present" / "temp.tif", _grid(P_T), units="degC", **kw)
    rain_p = _grid(P_R)
    write_tif(data / "present" / "rain.tif", rain_p, units="mm year-1", **kw)
    write_tif(data / "future" / "temp.tif", _grid(F_T), units="degC", **kw)
    write_tif(data / "future" / "rain.tif", _grid(F_R), units="mm year-1", **kw)
    survey = write_survey(data / "survey.csv")
    model = write_json(data / "model.json", model_document({"sp1": [TEMP, RAIN]}, outside="hold"))
    text = config_text(
        survey=survey,
        factors=[{"name": "temp", "layer": data / "present" / "temp.tif", "units": "degC", "basis": "linear"},
                 {"name": "rain", "layer": data / "present" / "rain.tif", "units": "mm year-1", "basis": "quadratic"}],
        futures=[{"scenario": "s1", "model": "m1", "period": "p1",
                  "layers": {"temp": data / "future" / "temp.tif", "rain": data / "future" / "rain.tif"}}],
        projection={"chunk": 64, "release_threshold": 0.10, "constraint_threshold": 0.10, "absolute_floor": 1.0},
    )
    cfg = data / "hand.toml"
    cfg.write_text(text, encoding="utf-8")
    out = root / "out"
    res = cli(["project", cfg, "--model", model, "--out", out])
    assert res.exit_code == 0, (res.stderr, res.exception)
    return out


def _assert_float_layer(path, expected_rows) -> None:
    got = read_float(path)
    exp = np.array(expected_rows, dtype=np.float64).astype(np.float32).astype(np.float64)
    assert got.shape == exp.shape
    np.testing.assert_array_equal(np.isnan(got), np.isnan(exp), err_msg=str(path))
    ok = ~np.isnan(exp)
    # float32 values written from the float64 computation: equal to the float32 of the hand value
    np.testing.assert_array_equal(got[ok], exp[ok], err_msg=str(path))


def test_present_ceiling_and_limiting_by_hand(hand_case):
    d = hand_case / "sp1" / "present"
    _assert_float_layer(d / "ceiling.tif", P_CEIL)
    np.testing.assert_array_equal(read_code(d / "limiting.tif"), np.array(P_CODE, dtype=np.uint8))


def test_future_layers_by_hand(hand_case):
    d = hand_case / "sp1" / "s1" / "m1" / "p1"
    _assert_float_layer(d / "ceiling.tif", F_CEIL)
    _assert_float_layer(d / "change.tif", CHANGE)
    _assert_float_layer(d / "change_pct.tif", PCT)
    np.testing.assert_array_equal(read_code(d / "limiting.tif"), np.array(F_CODE, dtype=np.uint8))
    np.testing.assert_array_equal(read_code(d / "zone.tif"), np.array(ZONE, dtype=np.uint8))
    np.testing.assert_array_equal(read_code(d / "switch.tif"), np.array(SWITCH, dtype=np.uint8))


def test_netcdf_holds_the_hand_values(hand_case):
    with netCDF4.Dataset(hand_case / "ceiling.nc") as ds:
        ds.set_auto_mask(True)
        cp = np.ma.filled(ds["ceiling_present"][0].astype(np.float64), np.nan)
        zone = np.ma.filled(ds["zone"][0, 0], 255)
        switch = np.ma.filled(ds["switch"][0, 0], 255)
        change = np.ma.filled(ds["change"][0, 0].astype(np.float64), np.nan)
    exp = np.array(P_CEIL, dtype=np.float32).astype(np.float64)
    np.testing.assert_array_equal(np.isnan(cp), np.isnan(exp))
    np.testing.assert_array_equal(cp[~np.isnan(exp)], exp[~np.isnan(exp)])
    np.testing.assert_array_equal(zone, np.array(ZONE))
    np.testing.assert_array_equal(switch, np.array(SWITCH))
    np.testing.assert_array_equal(np.isnan(change), np.isnan(np.array(CHANGE)))


def _row_area(r: int) -> float:
    # Source: pyproj.Geod (WGS84) area of the 1 x 1 degree cell polygon, parallels densified
    top = NORTH - r
    return geod_cell_area(WEST, top - 1.0, WEST + 1.0, top)


def test_summary_areas_by_hand(hand_case):
    """Zone areas are sums of the ellipsoidal areas of the cells hand-classified above."""
    s = pd.read_csv(hand_case / "summary.csv")
    fut = s[s["scenario"] == "s1"].iloc[0]
    zone = np.array(ZONE)
    names = {0: "stable", 1: "release", 2: "constraint", 3: "opens", 4: "closes", 5: "absent"}
    for code, name in names.items():
        expected = sum(_row_area(r) for r, c in zip(*np.nonzero(zone == code))) / 1e6
        assert fut[f"area_km2_{name}"] == pytest.approx(expected, rel=1e-5), name
    valid = zone != 255
    total = sum(_row_area(r) for r, c in zip(*np.nonzero(valid))) / 1e6
    assert fut["area_km2"] == pytest.approx(total, rel=1e-5)
    # area-weighted mean change over cells valid now and later
    ch = np.array(CHANGE)
    w = np.array([[_row_area(r)] * 4 for r in range(3)])
    mean = float((ch[valid] * w[valid]).sum() / w[valid].sum())
    assert fut["mean_change"] == pytest.approx(mean, rel=1e-5)
    # area-weighted median: sorted changes -37.5 (r1), -18.125 (r0), -17.5 (r2), -4 (r2), -0.5 (r0), ...
    # with row weights w0 < w1 < w2 (rows nearer the equator are larger) and total
    # 4 w0 + 3 w1 + 3 w2, the cumulative weight first passes half at the fifth value, -0.5.
    # The summary takes it from a change histogram, documented as exact to one bin width
    # (4000 bins over +-50, the smaller factor peak: 0.025).
    assert w[0, 0] < w[1, 0] < w[2, 0]
    assert abs(fut["median_change"] - (-0.5)) <= 0.025 + 1e-9
    pres = s[s["scenario"] == "present"].iloc[0]
    pvalid = ~np.isnan(np.array(P_CEIL))
    assert pres["area_km2"] == pytest.approx(w[pvalid].sum() / 1e6, rel=1e-5)
    # limited-by areas now: temp where the code is 0 among valid present cells
    pc = np.array(P_CODE)
    assert pres["area_km2_limited_now_temp"] == pytest.approx(w[pvalid & (pc == 0)].sum() / 1e6, rel=1e-5)
    assert pres["area_km2_limited_now_rain"] == pytest.approx(w[pvalid & (pc == 1)].sum() / 1e6, rel=1e-5)


def test_transitions_by_hand(hand_case):
    t = pd.read_csv(hand_case / "transitions.csv")
    assert len(t) == 4  # K x K rows
    pc, fc, zone = np.array(P_CODE), np.array(F_CODE), np.array(ZONE)
    valid = zone != 255
    names = ["temp", "rain"]
    for _, row in t.iterrows():
        i, j = names.index(row["limiting_now"]), names.index(row["limiting_later"])
        cells = np.nonzero(valid & (pc == i) & (fc == j))
        expected = sum(_row_area(r) for r in cells[0]) / 1e6
        assert row["area_km2"] == pytest.approx(expected, rel=1e-5, abs=1e-9), (row["limiting_now"], row["limiting_later"])


def test_hold_versus_extend_changes_the_limiting_code(tmp_path, hand_case):
    """Cell (1,1) is limited by rain only because temp is held at its observed maximum: with
    outside = "extend" eta_T = 60 - 2 * 35 = -10 < eta_R = -5.125, so temp becomes the limit."""
    data = hand_case.parent / "data"
    model = write_json(tmp_path / "extend.json", model_document({"sp1": [TEMP, RAIN]}, outside="extend"))
    out = tmp_path / "out"
    res = cli(["project", data / "hand.toml", "--model", model, "--out", out])
    assert res.exit_code == 0, res.stderr
    code = read_code(out / "sp1" / "present" / "limiting.tif")
    assert code[1, 1] == 0
    assert read_float(out / "sp1" / "present" / "ceiling.tif")[1, 1] == 0.0


def test_model_with_other_factor_names_is_refused(tmp_path, hand_case):
    data = hand_case.parent / "data"
    wrong = dict(TEMP, name="tmax")
    model = write_json(tmp_path / "wrong.json", model_document({"sp1": [wrong, RAIN]}))
    out = tmp_path / "out"
    res = cli(["project", data / "hand.toml", "--model", model, "--out", out])
    assert_refused(res.exit_code, res.stderr, out, "tmax", "model", exc=res.exception)
