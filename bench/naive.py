"""The whole-grid approach a user would write by hand, for comparison with ``ceiling project``.

    python -m bench.naive CONFIG OUT FUTURES

Every layer of a climate is opened whole with rioxarray, the maps of the law of the minimum and
of the change are computed with NumPy expressions over the whole grid (the minimum over a stack
of predictors, then change, percent change, zone and switch), and written with rioxarray
(GeoTIFF, COG driver, deflate level 1 with a predictor, all cores), as the projection writes its
GeoTIFFs. It does less than ``ceiling project``: no similarity maps (MESS), no NetCDF, summary
tables, figures, report or manifest; the comparison therefore understates the projection's lead.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np


def ceiling_plain(m, values: dict[str, np.ndarray]) -> tuple[np.ndarray, np.ndarray]:
    """The law of the minimum as one writes it in NumPy: full-size float64 stacks."""
    eta = np.stack([f.basis.predictor(np.clip(values[f.factor], *f.observed), f.params) for f in m.factors])
    c = np.maximum(eta, 0.0).min(axis=0)
    code = np.argmin(np.where(np.isnan(eta), np.inf, eta), axis=0).astype(np.uint8)
    bad = np.isnan(eta).any(axis=0)
    return np.where(bad, np.nan, c).astype(np.float32), np.where(bad, 255, code).astype(np.uint8)


def naive(cfg_path: Path, out: Path, n_fut: int) -> None:
    import rioxarray
    import xarray as xr

    from ceiling.kernels import change_kernel, switch_kernel, zone_kernel
    from ceiling.model import load_model

    from .inputs import PERIODS, K

    m = load_model(cfg_path.parent / "model.json")
    root = cfg_path.parent
    climates = [("present", root / "present")] + [(PERIODS[i], root / "future" / PERIODS[i]) for i in range(n_fut)]
    present = None
    for name, folder in climates:
        layers = {f: rioxarray.open_rasterio(folder / f"{f}.tif", masked=True).squeeze("band", drop=True).load()
                  for f in m.factor_names}
        tpl = layers[m.factor_names[0]]
        values = {f: a.values.astype(np.float64) for f, a in layers.items()}
        c, code = ceiling_plain(m, values)
        maps = {"ceiling": c, "limiting": code}
        if present is None:
            present = (c, code)
        else:
            ch, pct = change_kernel(present[0], c)
            maps.update(change=ch, change_pct=pct, zone=zone_kernel(present[0], c), switch=switch_kernel(present[1], code, K))
        (out / name).mkdir(parents=True, exist_ok=True)
        for lname, arr in maps.items():
            nodata = 255 if arr.dtype == np.uint8 else np.float32(-3.4028234663852886e38)
            if arr.dtype != np.uint8:
                arr = np.where(np.isnan(arr), nodata, arr).astype(np.float32)
            da_ = xr.DataArray(arr, dims=("y", "x"), coords={"y": tpl.y, "x": tpl.x})
            da_ = da_.rio.write_crs(tpl.rio.crs).rio.write_transform(tpl.rio.transform()).rio.write_nodata(nodata)
            da_.rio.to_raster(out / name / f"{lname}.tif", driver="COG", compress="DEFLATE", predictor="YES",
                              level=1, num_threads="ALL_CPUS")
        del layers, values, maps


if __name__ == "__main__":
    naive(Path(sys.argv[1]), Path(sys.argv[2]), int(sys.argv[3]))
