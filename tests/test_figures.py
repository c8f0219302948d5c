"""Map figures of a run folder (ceiling/maps.py): files, pixel sizes, legends, colours and scales.

The run folder is the demo run (``ceiling run configs/demo.toml``, once per session), which
makes every figure through ``make_figures`` before writing its manifest. The references here
are outside the figure code:

- PNG files are read with our own chunk parser (Source: PNG specification, ISO/IEC 15948:2004,
  sections 5.2 signature, 11.2.2 IHDR, 11.3.5.3 pHYs) and decoded with Pillow;
- class names and colours come from the GeoTIFFs themselves: the category names GDAL reports
  (``gdalinfo -json``, from the PAM ``.aux.xml``) and the colour table rasterio reads;
- areas come from ``summary.csv`` / ``transitions.csv`` read with the ``csv`` module;
- a decimated read is compared with block means computed with NumPy (common practice).
"""

from __future__ import annotations

import csv
import json
import shutil
import struct
import subprocess
import warnings
import xml.etree.ElementTree as ET
from pathlib import Path

import numpy as np
import pytest
import rasterio
from PIL import Image
from projection_helpers import demo_run, write_tif

from ceiling import maps
from ceiling.outputs.names import ENSEMBLE, FIGURES_DIR

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def run(tmp_path_factory) -> Path:
    out, _ = demo_run(tmp_path_factory)
    return out


@pytest.fixture(scope="module")
def info(run):
    return maps.run_info(run)


# --- outside readers -------------------------------------------------------------------------------------

def png_chunks(path: Path) -> dict[bytes, bytes]:
    """The first chunk of each type (PNG spec 5.3: length, type, data, CRC)."""
    data = path.read_bytes()
    assert data[:8] == PNG_SIGNATURE, f"{path} is not a PNG"
    out, i = {}, 8
    while i < len(data):
        (n,) = struct.unpack(">I", data[i:i + 4])
        kind = data[i + 4:i + 8]
        out.setdefault(kind, data[i + 8:i + 8 + n])
        i += 12 + n
        if kind == b"IEND":
            break
    return out


def png_size(path: Path) -> tuple[int, int]:
    w, h = struct.unpack(">II", png_chunks(path)[b"IHDR"][:8])
    return w, h


def png_dpi(path: Path) -> float:
    x, _y, unit = struct.unpack(">IIB", png_chunks(path)[b"pHYs"][:9])
    assert unit == 1, "pHYs unit is not the metre"
    return x * 0.0254


def gdal_categories(path: Path) -> list[str]:
    """Category names of band 1 as GDAL reports them (``gdalinfo -json``; the .aux.xml without GDAL)."""
    if shutil.which("gdalinfo"):
        res = subprocess.run(["gdalinfo", "-json", str(path)], capture_output=True, text=True, check=True)
        return list(json.loads(res.stdout)["bands"][0].get("categories", []))
    aux = path.with_name(path.name + ".aux.xml")
    return [c.text or "" for c in ET.parse(aux).getroot().iter("Category")]


def colour_table(path: Path) -> dict[int, tuple[int, int, int]]:
    with rasterio.open(path) as src:
        return {k: tuple(v[:3]) for k, v in src.colormap(1).items()}


def codes_present(path: Path) -> dict[int, int]:
    with rasterio.open(path) as src:
        a = src.read(1)
        nodata = src.nodata
    vals, counts = np.unique(a[a != nodata], return_counts=True)
    return {int(v): int(c) for v, c in zip(vals, counts)}


def read_rows(path: Path) -> list[dict[str, str]]:
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def axes_titled(fig, title: str):
    found = [ax for ax in fig.axes if ax.get_title() == title]
    assert found, f"no panel titled {title!r}: {[ax.get_title() for ax in fig.axes]}"
    return found[0]


def rendered(fig) -> np.ndarray:
    fig.canvas.draw()
    return np.asarray(fig.canvas.buffer_rgba())[..., :3].copy()


def crop(img: np.ndarray, fig, ax) -> np.ndarray:
    bb = ax.get_window_extent()
    h = img.shape[0]
    return img[int(np.ceil(h - bb.y1)) + 1:int(np.floor(h - bb.y0)) - 1, int(np.ceil(bb.x0)) + 1:int(np.floor(bb.x1)) - 1]


def hatched(collection) -> bool:
    return bool(collection.get_hatch()) or any(getattr(collection, "hatches", None) or [])


def climates(run: Path, species: str) -> list[tuple[str, str, str]]:
    return list(dict.fromkeys((r["scenario"], r["model"], r["period"]) for r in read_rows(run / "summary.csv")
                              if r["species"] == species))


# --- files ------------------------------------------------------------------------------------------------------

def test_every_figure_is_written_non_empty_and_not_blank(run, info):
    tasks = maps.figure_tasks(info)
    names = [n for t in tasks for n in t.names(("png",))]
    # one map sheet per species and climate of summary.csv, comparison sheets per climate model
    for sp in ("sp_a", "sp_b", "sp_c"):
        for key in climates(run, sp):
            assert maps.climate_sheet_name(sp, key) in names, (sp, key)
        models = {k[1] for k in climates(run, sp) if k[0] != "present"}
        assert ENSEMBLE in models
        for m in models:
            for layer in ("change", "zone"):
                assert maps.comparison_sheet_name(sp, m, layer) in names
        assert maps.limiting_figure_name(sp, "areas") in names and maps.limiting_figure_name(sp, "switch") in names
    for rel in names:
        p = run / rel
        assert p.is_file() and p.stat().st_size > 10_000, rel
        w, h = png_size(p)
        with Image.open(p) as im:
            assert im.size == (w, h)
            small = im.convert("RGB").reduce(4)
        grey = np.asarray(small.convert("L"), dtype=np.float64)
        colours = len(small.getcolors(1 << 20) or [])
        assert grey.std() > 8.0, f"{rel} looks blank (std {grey.std():.1f})"
        assert colours > 20, f"{rel} has only {colours} colours"
        assert png_dpi(p) == pytest.approx(maps.DPI, abs=0.5), rel
    left = [p for p in (run / FIGURES_DIR).rglob("*") if p.name.startswith(".")]
    assert not left, f"temporary files left: {left}"


@pytest.mark.parametrize("which", ["present", "model", "ensemble", "compare", "areas", "switch"])
def test_pixel_size_is_figure_size_times_dpi(run, info, which):
    sp = "sp_b"
    keys = climates(run, sp)
    if which == "present":
        key = keys[0]
        fig, rel = maps.climate_sheet(info, sp, key), maps.climate_sheet_name(sp, key)
    elif which == "model":
        key = next(k for k in keys if k[0] != "present" and k[1] != ENSEMBLE)
        fig, rel = maps.climate_sheet(info, sp, key), maps.climate_sheet_name(sp, key)
    elif which == "ensemble":
        key = next(k for k in keys if k[1] == ENSEMBLE)
        fig, rel = maps.climate_sheet(info, sp, key), maps.climate_sheet_name(sp, key)
    elif which == "compare":
        fig, rel = maps.comparison_sheet(info, sp, "model-b", "zone"), maps.comparison_sheet_name(sp, "model-b", "zone")
    elif which == "areas":
        fig, rel = maps.limiting_area_figure(info, sp), maps.limiting_figure_name(sp, "areas")
    else:
        fig, rel = maps.switch_matrix_figure(info, sp), maps.limiting_figure_name(sp, "switch")
    w_in, h_in = fig.get_size_inches()
    assert fig.dpi == maps.DPI == 200
    assert png_size(run / rel) == (round(w_in * 200), round(h_in * 200))
    assert round(w_in * 200) >= 1200  # print size: at least 6 inches across at 200 dpi


# --- legends and colours ------------------------------------------------------------------------------------------

@pytest.mark.parametrize("key,layer,title,legend", [
    (("ssp585", "model-b", "2071-2100"), "zone", "Zone of change", "zone class"),
    (("ssp585", ENSEMBLE, "2071-2100"), "zone", "Zone of change", "zone class"),
    (("present", "", "1991-2020"), "limiting", "Limiting factor", "limiting factor"),
    (("ssp245", "model-c", "2041-2070"), "limiting", "Limiting factor", "limiting factor"),
])
def test_categorical_legend_lists_every_class_present_in_the_geotiff_colours(run, info, key, layer, title, legend):
    sp = "sp_a"
    tif = run / sp / Path(*([key[0]] if key[0] == "present" else list(key))) / f"{layer}.tif"
    names = gdal_categories(tif)
    table = colour_table(tif)
    present = codes_present(tif)
    assert present, tif
    fig = maps.climate_sheet(info, sp, key)
    labels = maps.legend_labels(fig)[legend]
    leg = axes_titled(fig, title).get_legend()
    handles = dict(zip([t.get_text() for t in leg.get_texts()], leg.legend_handles))
    if layer == "limiting":  # the factors, in the order of the codes, then the nodata entry
        assert labels[:len(names)] == names and labels[len(names):] == ["no data"], (labels, names)
    for code in present:
        name = names[code]
        assert name in labels, (code, name, labels)
        rgb = tuple(round(255 * c) for c in handles[name].get_facecolor()[:3])
        assert rgb == table[code], (name, rgb, table[code])


def test_zone_map_shows_each_class_over_its_share_of_cells(run, info):
    """The zone panel's pixels, in the exact colours of the GeoTIFF's colour table, cover each
    class in proportion to its cells (cells are equal on the screen: a lon/lat grid drawn with
    one aspect)."""
    sp, key = "sp_c", ("ssp585", "model-a", "2071-2100")
    tif = run / sp / Path(*key) / "zone.tif"
    present = codes_present(tif)
    table = colour_table(tif)
    fig = maps.climate_sheet(info, sp, key)
    img = crop(rendered(fig), fig, axes_titled(fig, "Zone of change"))
    pix = {c: int(np.all(img == np.array(table[c], dtype=np.uint8), axis=-1).sum()) for c in present}
    total_cells, total_pix = sum(present.values()), sum(pix.values())
    assert total_pix > 50_000
    for c, n in present.items():
        share = n / total_cells
        if share >= 0.02:
            assert pix[c] / total_pix == pytest.approx(share, abs=0.03), (c, share, pix[c] / total_pix)


def test_change_scale_is_diverging_centred_and_shared_by_every_climate_of_a_species(run, info):
    sp = "sp_a"
    keys = [k for k in climates(run, sp) if k[0] != "present"]
    largest = 0.0
    for k in keys:
        name = "median_change" if k[1] == ENSEMBLE else "change"
        with rasterio.open(run / sp / Path(*k) / f"{name}.tif") as src:
            a = src.read(1, masked=True)
        largest = max(largest, float(np.abs(a).max()))
    norms = []
    for k in [keys[0], keys[5], next(k for k in keys if k[1] == ENSEMBLE)]:
        fig = maps.climate_sheet(info, sp, k)
        title = "Change, median of the climate models" if k[1] == ENSEMBLE else "Change of the ceiling"
        im = axes_titled(fig, title).images[0]
        norms.append((im.norm.vmin, im.norm.vmax))
        assert im.cmap.name.startswith("RdBu")
        assert im.norm(0.0) == pytest.approx(0.5)
    comp = maps.comparison_sheet(info, sp, "model-c", "change")
    for ax in comp.axes:
        if ax.images:
            norms.append((ax.images[0].norm.vmin, ax.images[0].norm.vmax))
    assert len(set(norms)) == 1, norms
    vmin, vmax = norms[0]
    assert vmin == -vmax
    assert largest <= vmax <= 1.25 * largest  # nothing clipped, and not much wasted range


def test_comparison_sheet_has_scenarios_across_periods_down_and_one_colour_bar(run, info):
    sp = "sp_b"
    fig = maps.comparison_sheet(info, sp, "model-a", "change")
    futures = [k for k in climates(run, sp) if k[1] == "model-a"]
    scenarios = list(dict.fromkeys(k[0] for k in futures))
    periods = list(dict.fromkeys(k[2] for k in futures))
    panels = {ax.get_title(): ax for ax in fig.axes if ax.images}
    assert set(panels) == {f"scenario {s}, {p}" for s in scenarios for p in periods}
    for i, s in enumerate(scenarios):
        for j, p in enumerate(periods):
            bb = panels[f"scenario {s}, {p}"].get_position()
            if i:
                assert bb.x0 > panels[f"scenario {scenarios[i - 1]}, {p}"].get_position().x1  # across
            if j:
                assert bb.y1 < panels[f"scenario {s}, {periods[j - 1]}"].get_position().y0  # down
    colour_bars = [ax for ax in fig.axes if getattr(ax, "_colorbar", None) is not None]
    assert len(colour_bars) == 1
    assert "climate model model-a" in " ".join(t.get_text() for t in fig.texts)


def test_novel_cells_are_hatched_and_low_agreement_is_hatched_on_the_ensemble(run, info):
    sp = "sp_a"
    key = next(k for k in climates(run, sp) if k[1] not in ("", ENSEMBLE)
               and 1 in codes_present(run / sp / Path(*k) / "extrapolated.tif"))
    fig = maps.climate_sheet(info, sp, key)
    ax = axes_titled(fig, "Climate similarity to the survey (MESS)")
    assert any(hatched(c) for c in ax.collections)
    assert maps.NOVEL_HATCH_LABEL in maps.legend_labels(fig)[""]
    ens = next(k for k in climates(run, sp) if k[1] == ENSEMBLE and 0 in codes_present(run / sp / Path(*k) / "robustness.tif"))
    fig = maps.climate_sheet(info, sp, ens)
    ax = axes_titled(fig, "Change, median of the climate models")
    assert any(hatched(c) for c in ax.collections)
    assert maps.LOW_AGREEMENT_LABEL in maps.legend_labels(fig)[""]


def test_map_axes_are_the_grid_extent_in_degrees_north_up(run, info):
    sp, key = "sp_b", ("present", "", "1991-2020")
    with rasterio.open(run / sp / "present" / "ceiling.tif") as src:
        b = src.bounds
    fig = maps.climate_sheet(info, sp, key)
    ax = axes_titled(fig, "Potential maximum abundance (ceiling)")
    assert ax.get_xlim() == pytest.approx((b.left, b.right))
    assert ax.get_ylim() == pytest.approx((b.bottom, b.top)) and b.bottom < b.top  # north up
    fig.canvas.draw()
    lats = [t.get_text() for t in ax.get_yticklabels() if t.get_text()]
    lons = [t.get_text() for t in axes_titled(fig, "Limiting factor").get_xticklabels() if t.get_text()]
    assert lats and all(t.endswith("°S") for t in lats), lats  # the demo island lies at 40-48 S
    assert lons and all(t.endswith("°W") for t in lons), lons
    graticule = [c for c in ax.collections if c.get_gid() == "graticule"]
    assert len(graticule) == 2  # meridians and parallels at the labelled ticks
    assert sorted(round(float(seg[0][0]), 6) for seg in graticule[0].get_segments()) == \
        sorted(round(float(v), 6) for v in ax.get_xticks())


def test_sheets_drawn_over_a_reused_background_match_a_full_draw(run, info, tmp_path):
    """Map sheets reuse the drawn static parts (frames, ticks, colour bars, legends) of alike
    sheets; the pixels must be those of drawing each sheet from scratch."""
    sp = "sp_c"
    keys = [k for k in climates(run, sp) if k[1] not in ("", ENSEMBLE)][:2]
    sheets = [(k, maps.climate_sheet) for k in keys] + [("model-b", None)]
    for what, build in sheets:
        def make(what=what, build=build):
            return build(info, sp, what) if build else maps.comparison_sheet(info, sp, what, "zone")
        p = maps.save_figure(make(), tmp_path / "sheet.png")
        with Image.open(p) as im:
            saved = np.asarray(im.convert("RGB"), dtype=np.int16)
        full = rendered(make()).astype(np.int16)
        assert saved.shape == full.shape
        differ = np.abs(saved - full).max(axis=-1) > 0
        assert differ.mean() < 1e-3, (what, differ.mean())  # a few antialiased edge pixels at most


# --- limiting-factor figures --------------------------------------------------------------------------------------

def test_limiting_bars_are_the_areas_of_summary_csv(run, info):
    """Bars come from transitions.csv (row sums now, column sums later); summary.csv has the same
    areas reduced separately by the projection."""
    sp = "sp_c"
    fig = maps.limiting_area_figure(info, sp)
    ax = fig.axes[0]
    factors = [t.get_text() for t in ax.get_legend().get_texts()]
    labels = [t.get_text() for t in ax.get_xticklabels()]
    rows = {(r["scenario"], r["model"], r["period"]): r for r in read_rows(run / "summary.csv") if r["species"] == sp}
    heights = {}
    for container, f in zip(ax.containers, factors):
        for label, bar in zip(labels, container):
            heights[(label, f)] = bar.get_height()
    present = next(r for k, r in rows.items() if k[0] == "present")
    for f in factors:
        assert heights[("present", f)] == pytest.approx(float(present[f"area_km2_limited_now_{f}"]), rel=2e-3, abs=0.5)
    for label in labels[1:]:
        r = rows[tuple(label.split("\n"))]
        for f in factors:
            assert heights[(label, f)] == pytest.approx(float(r[f"area_km2_limited_later_{f}"]), rel=2e-3, abs=0.5), (label, f)


def test_switch_matrix_writes_the_mean_transition_areas_in_its_cells(run, info):
    sp = "sp_a"
    fig = maps.switch_matrix_figure(info, sp)
    trans = [r for r in read_rows(run / "transitions.csv") if r["species"] == sp]
    for ax in fig.axes:
        title = ax.get_title()
        if not title.startswith("scenario "):
            continue
        sc, pe = title.split("\n")[0][len("scenario "):].split(", ")
        sub = [r for r in trans if r["scenario"] == sc and r["period"] == pe]
        n_models = len({r["model"] for r in sub})
        factors = [t.get_text() for t in ax.get_xticklabels()]
        expected = {}
        for r in sub:
            key = (factors.index(r["limiting_now"]), factors.index(r["limiting_later"]))
            expected[key] = expected.get(key, 0.0) + float(r["area_km2"]) / n_models
        shown = {(round(t.get_position()[1]), round(t.get_position()[0])): float(t.get_text().replace(",", ""))
                 for t in ax.texts}
        assert set(shown) == set(expected)
        for k, v in expected.items():
            assert shown[k] == pytest.approx(v, abs=0.51), (title, k)


# --- reading big grids, formats --------------------------------------------------------------------------------------

def test_big_grids_are_read_decimated_to_block_means(tmp_path):
    rng = np.random.default_rng(3)
    a = rng.uniform(0, 100, (300, 400))
    a[:40, :40] = np.nan
    p = write_tif(tmp_path / "big.tif", a, west=0.0, north=60.0, cell=0.01)
    layer = maps.read_layer(p, max_side=100)
    assert layer.data.shape == (75, 100)
    blocks = a.reshape(75, 4, 100, 4)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # the all-nodata blocks
        means = np.nanmean(blocks, axis=(1, 3))
    assert np.ma.getmaskarray(layer.data)[:10, :10].all()  # all-nodata blocks stay nodata
    np.testing.assert_allclose(np.ma.filled(layer.data, np.nan)[10:, 10:], means[10:, 10:], rtol=1e-5)
    assert layer.extent == pytest.approx((0.0, 4.0, 57.0, 60.0))
    codes = np.repeat(np.arange(12, dtype=float).reshape(3, 4), 100, axis=0).repeat(100, axis=1)
    q = write_tif(tmp_path / "codes.tif", codes, west=0.0, north=60.0, cell=0.01)
    cat = maps.read_layer(q, categorical=True, max_side=40)
    assert cat.data.shape == (30, 40)
    assert set(np.unique(cat.data.compressed())) <= set(range(12))


def test_svg_on_request_and_unknown_formats_refused(run, info, tmp_path):
    fig = maps.limiting_area_figure(info, "sp_a")
    p = maps.save_figure(fig, tmp_path / "bars.svg")
    root = ET.parse(p).getroot()
    assert root.tag.endswith("svg")
    w_in, h_in = fig.get_size_inches()
    assert float(root.get("width").removesuffix("pt")) == pytest.approx(w_in * 72)
    assert float(root.get("height").removesuffix("pt")) == pytest.approx(h_in * 72)
    assert "tmax_warm" in p.read_text(encoding="utf-8")  # text kept as text (svg.fonttype none)
    with pytest.raises(ValueError, match="png or svg"):
        maps.make_figures(run, formats=("jpg",))


def colour_bar_label(fig, panel) -> str:
    """The label of the colour bar drawn right of ``panel`` (the nearest axes to its right whose
    middle lies within the panel's height)."""
    p = panel.get_position()
    bars = [ax for ax in fig.axes if ax is not panel and ax.get_ylabel()
            and ax.get_position().x0 >= p.x1 - 1e-6 and p.y0 <= (ax.get_position().y0 + ax.get_position().y1) / 2 <= p.y1]
    assert bars, f"no colour bar beside {panel.get_title()!r}"
    return min(bars, key=lambda ax: ax.get_position().x0).get_ylabel()


def test_community_panels_are_labelled_by_what_they_show(tmp_path):
    # richness_change is stored as float32 (a loss is negative) like the summed ceilings; its colour
    # bar must still speak of species, and only the summed ceilings of abundance
    grid = dict(west=10.0, north=50.0, cell=0.1)
    rel = Path("community") / "s1" / "m1" / "p1"
    rng = np.random.default_rng(3)
    counts = rng.integers(0, 4, (12, 15)).astype(float)
    layers = {"total_ceiling": rng.uniform(0, 90, (12, 15)), "total_change": rng.uniform(-20, 20, (12, 15)),
              "richness": counts, "richness_change": counts - 2.0, "n_release": counts, "n_constraint": 3.0 - counts}
    for name, data in layers.items():
        write_tif(tmp_path / rel / f"{name}.tif", data, **grid)
    fig = maps.community_sheet(tmp_path, rel)
    labels = {name: colour_bar_label(fig, axes_titled(fig, maps.COMMUNITY_TITLES[name])) for name in layers}
    assert labels == {name: maps.COMMUNITY_SCALES[name] for name in layers}
    assert "species" in labels["richness_change"] and "change" in labels["richness_change"]
    assert [n for n, lab in labels.items() if "abundance" in lab] == ["total_ceiling", "total_change"]
