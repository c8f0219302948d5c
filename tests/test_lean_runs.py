"""Lean runs: ``[outputs] maps``, ``netcdf`` and ``report`` choose what a run writes.

A full run of a small invented case (two species, two climate models, so an ensemble) is the
reference: every map a lean run writes must be byte for byte the same file as in the full run,
and the summary tables (always written) the same tables. The catalogue is checked with pystac
(an outside reader): it lists exactly the maps on disk.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pystac
import pytest
from projection_helpers import SmallCase, assert_refused, cli, config_text

from ceiling.config import load_config
from ceiling.errors import ConfigError
from ceiling.outputs.choice import with_outputs
from ceiling.outputs.names import MAP_NAMES, NETCDF_FILE, STAC_ROOT_FILE, SUMMARY_FILE, TRANSITIONS_FILE
from ceiling.running import run_fingerprint


def sha(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()


def maps_of(run: Path) -> dict[str, Path]:
    """Every map GeoTIFF of a run folder by its path relative to the folder."""
    return {str(p.relative_to(run)): p for p in sorted(run.rglob("*.tif"))}


@pytest.fixture(scope="module")
def case(tmp_path_factory) -> SmallCase:
    return SmallCase(tmp_path_factory.mktemp("lean") / "case", ny=70, nx=90, futures=2)  # 2 x 2 chunks


def config(case: SmallCase, name: str, table: str = "") -> Path:
    """The case's config with periods as years (so the catalogue has items), and ``[outputs]``."""
    futures = [dict(f, period="2041-2070") for f in case.futures]
    text = config_text(survey=case.survey, factors=case.factors(), futures=futures, present={"period": "1991-2020"},
                       projection={"chunk": 64})
    cfg = case.data / name
    cfg.write_text(text + (f"\n[outputs]\n{table}\n" if table else ""), encoding="utf-8")
    return cfg


def project(case: SmallCase, cfg: Path, out: Path) -> Path:
    res = cli(["project", cfg, "--model", case.model, "--out", out])
    assert res.exit_code == 0, res.output
    return out


@pytest.fixture(scope="module")
def full(case, tmp_path_factory) -> Path:
    return project(case, config(case, "full.toml"), tmp_path_factory.mktemp("full") / "run")


@pytest.mark.parametrize("table, layers", [
    ('maps = ["ceiling", "limiting"]\nnetcdf = false\nreport = false', {"ceiling", "limiting"}),
    # the zone maps need the futures' comparison with the present, computed but not written
    ('maps = ["zone"]\nreport = false', {"zone"}),
    # a similarity map needs the full similarity computation (the others need only its sign)
    (f'maps = ["{MAP_NAMES[2]}", "extrapolated"]\nnetcdf = false\nreport = false', {MAP_NAMES[2], "extrapolated"}),
])
def test_a_lean_run_writes_exactly_the_maps_asked_for_as_a_full_run_does(case, full, tmp_path, table, layers):
    run = project(case, config(case, f"lean{len(layers)}.toml", table), tmp_path / "run")
    lean, whole = maps_of(run), maps_of(full)
    assert lean and {Path(k).stem for k in lean} == layers
    assert set(lean) == {k for k in whole if Path(k).stem in layers}  # in every climate that has the map
    for rel, p in lean.items():
        assert sha(p) == sha(whole[rel]), rel
        for side in (p.with_name(p.name + ".aux.xml"), p.with_suffix(".qml")):  # category sidecars too
            assert side.is_file() == (full / side.relative_to(run)).is_file()
    for table_file in (SUMMARY_FILE, TRANSITIONS_FILE):  # always written, the same tables
        assert (run / table_file).read_bytes() == (full / table_file).read_bytes()
    assert not (run / "report.html").exists() and not (run / "figures").exists()
    assert (run / NETCDF_FILE).is_file() == ("netcdf = false" not in table)
    manifest = json.loads((run / "manifest.json").read_text())
    listed = {o["path"] for o in manifest["outputs"]}
    on_disk = {str(p.relative_to(run)) for p in run.rglob("*") if p.is_file() and p.name != "manifest.json"}
    assert listed == on_disk
    coll = pystac.Collection.from_file(str(run / STAC_ROOT_FILE))
    assets = {Path(a.get_absolute_href()).resolve() for item in coll.get_items() for a in item.assets.values()}
    assert assets == {p.resolve() for p in lean.values()}
    assert "report" not in {Path(a.href).stem for a in coll.assets.values()}


def test_the_netcdf_of_a_lean_run_holds_the_maps_asked_for(case, tmp_path):
    import netCDF4

    run = project(case, config(case, "nc.toml", 'maps = ["ceiling", "zone"]\nreport = false'), tmp_path / "run")
    with netCDF4.Dataset(run / NETCDF_FILE) as ds:
        maps = {v for v in ds.variables if v.startswith(("ceiling", "zone", "limiting", "change"))}
    assert maps == {"ceiling_present", "ceiling", "zone"}


def test_an_unknown_map_name_is_one_error_line_listing_the_valid_ones(case, tmp_path):
    cfg = config(case, "bad.toml", 'maps = ["ceiling", "ceilng"]')
    res = cli(["project", cfg, "--model", case.model, "--out", tmp_path / "out"])
    line = assert_refused(res.exit_code, res.stderr, tmp_path / "out", "outputs.maps", "ceilng", exc=res.exception)
    assert all(name in line for name in MAP_NAMES)


def test_the_python_api_checks_the_choice_as_the_config_file_does(case):
    cfg = load_config(config(case, "api.toml"))
    with pytest.raises(ConfigError, match=r"outputs\.maps.*'zones'.*valid map names: ceiling"):
        with_outputs(cfg, maps=["ceiling", "zones"])
    with pytest.raises(ConfigError, match="outputs.netcdf"):
        with_outputs(cfg, netcdf="no")


def test_what_is_written_is_part_of_the_resume_fingerprint(case):
    cfg = load_config(config(case, "fp.toml"))
    lean = with_outputs(cfg, maps=["ceiling"], netcdf=False)
    assert lean.outputs == {"maps": ["ceiling"], "netcdf": False}
    prints = {run_fingerprint(c, [], None) for c in (cfg, lean, with_outputs(cfg, report=False))}
    assert len(prints) == 3
