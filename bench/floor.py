"""The I/O floor of ``ceiling project``: decode the same inputs, encode the same outputs.

    python -m bench.floor prepare RUN_DIR RAW_DIR      # untimed: the run's maps as raw arrays
    python -m bench.floor run CONFIG RAW_DIR OUT THREADS

``run`` does, with THREADS threads, only what no projection can avoid: it decodes every chunk
of every input layer of every climate (through the projection's own reader), and writes the
same maps (the exact pixels of RUN_DIR's GeoTIFFs, read from uncompressed arrays prepared
beforehand, so that no decoding of outputs is timed) with the projection's own writers: the
streamed files with their overview blocks, the NetCDF chunks (same layout, same encoder), the
COG copies. No model is evaluated and no statistic reduced; no figures, tables or manifest.
The ratio of ``ceiling project`` to this is the cost of the engine beyond its I/O.
"""

from __future__ import annotations

import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np


def prepare(run_dir: Path, raw: Path) -> None:
    """Every GeoTIFF map of a run as a raw ``.npy`` array (same relative path)."""
    import rasterio

    for tif in sorted(run_dir.rglob("*.tif")):
        rel = tif.relative_to(run_dir)
        if rel.parts[0] in ("figures", "community"):
            continue
        dst = raw / rel.with_suffix(".npy")
        dst.parent.mkdir(parents=True, exist_ok=True)
        with rasterio.open(tif) as src:
            out = np.lib.format.open_memmap(dst, mode="w+", dtype=src.dtypes[0], shape=(src.height, src.width))
            for _, win in src.block_windows(1):
                out[win.toslices()] = src.read(1, window=win)
            out.flush()
            del out


@dataclass(frozen=True)
class FloorPlan:
    """Reads the climate's layers (decoding them) and hands over the prepared maps."""

    readers: tuple
    maps: tuple
    arrays: tuple  # paths of the raw maps, following ``maps``
    nc_chunk: tuple[int, int] = (0, 0)
    write_maps: bool = True

    def compute(self, rows: slice, cols: slice):
        valid = np.array([np.count_nonzero(~np.isnan(r[rows, cols])) for r in self.readers], dtype=np.int64)
        out = {}
        for spec, path in zip(self.maps, self.arrays):
            a = np.array(np.load(path, mmap_mode="r")[rows, cols])
            if spec.dtype == "float32":
                a[a == np.float32(-3.4028234663852886e38)] = np.nan
            out[(spec.species, spec.layer)] = a
        return out, [], valid


def run(cfg_path: Path, raw: Path, out: Path, threads: int) -> float:
    import rasterio

    from ceiling.climate_writer import map_specs, netcdf_variables, write_climate
    from ceiling.cluster import compute_context
    from ceiling.config import load_config
    from ceiling.grids import template_grid
    from ceiling.outputs.names import FUTURE_LAYERS, NETCDF_FILE, PRESENT_LAYERS, layer_path
    from ceiling.outputs.netcdf import create_netcdf
    from ceiling.projection import climate_readers
    from ceiling.scenarios import climates, projection_options

    t0 = time.perf_counter()
    cfg = load_config(cfg_path)
    opts = projection_options(cfg)
    cl = climates(cfg)
    used = cfg.factor_names
    grid = template_grid(cl[0].layers[used[0]], factor=used[0])
    species = sorted(p.name for p in raw.iterdir() if p.is_dir())
    out.mkdir(parents=True, exist_ok=True)
    variables = netcdf_variables(PRESENT_LAYERS, FUTURE_LAYERS if len(cl) > 1 else (), used)
    nc = create_netcdf(out / NETCDF_FILE, grid=grid, species=species, futures=[c.key for c in cl[1:]],
                       variables=variables, attrs={}, chunk=opts.chunk)
    with rasterio.Env(GDAL_CACHEMAX=opts.gdal_cache_mb), compute_context(threads=threads) as comp:
        from ceiling.areas import window_areas

        nc.write_areas(lambda r, c: window_areas(grid, r, c))
        for j, c in enumerate(cl):
            names = PRESENT_LAYERS if j == 0 else FUTURE_LAYERS

            def spec(i: int, layer: str, j=j):
                return (f"{layer}_present", (i,), None) if j == 0 else (layer, (i, j - 1), None)

            maps = map_specs(len(species), names, grid, opts.chunk, netcdf=spec)
            readers = climate_readers(c, grid, used, {f: "1" for f in used}, opts)
            arrays = tuple(raw / layer_path(species[s.species], c.key, s.layer).with_suffix(".npy") for s in maps)
            plan = FloorPlan(tuple(readers[f] for f in used), maps, arrays, nc.chunk_shape)
            write_climate(comp, out, grid, c, plan, species=species, factor_lists=[used] * len(species),
                          chunk=opts.chunk, n_stats=0, nc=nc, record=False, deflate_level=opts.deflate_level)
        nc.close()
    return time.perf_counter() - t0


def main(argv: list[str]) -> None:
    if argv[0] == "prepare":
        prepare(Path(argv[1]), Path(argv[2]))
    elif argv[0] == "run":
        print(f"{run(Path(argv[1]), Path(argv[2]), Path(argv[3]), int(argv[4])):.3f}")
    else:
        raise SystemExit(__doc__)


if __name__ == "__main__":
    main(sys.argv[1:])
