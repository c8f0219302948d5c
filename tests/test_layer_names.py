"""The similarity layers go by the project's own names everywhere.

The multivariate environmental similarity layer is written as ``similarity`` (the MESS value, %)
and the factor with the lowest similarity as ``least_similar``; the earlier names (``novelty``,
``novel_factor``) must appear nowhere: not in the package, README or developer notes, and not in
a run's file names, NetCDF variables, sidecars, catalogue, tables or report text. "novel climate"
(MESS below 0) and the ``share_novel`` / ``area_km2_novel`` columns stay: they name the climate,
not a layer.
"""

from __future__ import annotations

import re
from pathlib import Path

import netCDF4
from projection_helpers import REPO, small_run

from ceiling.outputs.names import FUTURE_LAYERS, NETCDF_FILE, PRESENT_LAYERS

OLD = re.compile(r"\bnovelty\b|novel_factor", re.IGNORECASE)
TEXT_SUFFIXES = {".py", ".j2", ".md", ".toml", ".html", ".css", ".json", ".xml", ".qml", ".csv", ".txt"}
DATA_URI = re.compile(r"data:[a-z/+.-]+;base64,[A-Za-z0-9+/=]+")


def old_names_in(paths) -> list[str]:
    """``file:line: text`` of every line that holds an old layer name (data: URIs left out)."""
    hits = []
    for p in paths:
        if Path(p).suffix.lower() not in TEXT_SUFFIXES:
            continue
        text = DATA_URI.sub("", Path(p).read_text(encoding="utf-8", errors="replace"))
        hits += [f"{p}:{i}: {line.strip()[:120]}" for i, line in enumerate(text.splitlines(), 1) if OLD.search(line)]
    return hits


def test_the_pattern_finds_the_old_names():
    # the check below could not fail if the pattern matched nothing
    assert OLD.search("novelty.tif") and OLD.search("novel_factor_present") and OLD.search("Novelty maps")
    assert not OLD.search("novel climate") and not OLD.search("share_novel") and not OLD.search("novel_cells")


def test_package_readme_and_notes_use_the_new_names():
    files = [p for p in (REPO / "ceiling").rglob("*") if p.is_file()]
    files += [REPO / "README.md", REPO / "DEVELOPERS.md", *(REPO / "configs").glob("*.toml"), *(REPO / "bench").glob("*.py")]
    assert len(files) > 40
    assert old_names_in(files) == []
    assert "similarity" in PRESENT_LAYERS and "least_similar" in PRESENT_LAYERS and "extrapolated" in PRESENT_LAYERS
    assert {"similarity", "least_similar", "extrapolated"} <= set(FUTURE_LAYERS)


def test_a_run_writes_the_new_names_only(tmp_path_factory):
    run = small_run(tmp_path_factory)
    files = [p for p in run.rglob("*") if p.is_file()]
    names = [p.relative_to(run).as_posix() for p in files]
    assert [n for n in names if OLD.search(n)] == []
    for layer in ("similarity.tif", "least_similar.tif", "least_similar.tif.aux.xml", "least_similar.qml"):
        assert f"sp1/present/{layer}" in names, layer
    with netCDF4.Dataset(run / NETCDF_FILE) as nc:
        variables = list(nc.variables)
    assert [v for v in variables if OLD.search(v)] == []
    assert "similarity_present" in variables and "least_similar_present" in variables
    texts = [p for p in files if p.suffix.lower() in TEXT_SUFFIXES]
    assert any(p.name == "report.html" for p in texts) and any(p.suffix == ".qml" for p in texts)
    assert old_names_in(texts) == []
