"""The run manifest: what went in, what came out, with checksums, versions and timing.

It is written last, so a manifest on disk always describes complete files.
"""

from __future__ import annotations

import json
from collections.abc import Iterable, Mapping
from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

from .atomic import atomic_write_text, sha256_file

__all__ = ["package_versions", "file_entry", "write_manifest", "MANIFEST_KIND"]

MANIFEST_KIND = "ceiling-run-manifest"
PACKAGES = ("ceiling", "numpy", "scipy", "pandas", "xarray", "dask", "rasterio", "rioxarray", "statsmodels",
            "geopandas", "pyproj", "netCDF4", "matplotlib", "pint", "cf-xarray", "distributed")


def package_versions() -> dict[str, str]:
    out = {}
    for p in PACKAGES:
        try:
            out[p] = version(p)
        except PackageNotFoundError:
            continue
    import rasterio

    out["GDAL"] = rasterio.__gdal_version__
    return out


def file_entry(path: Path, root: Path | None = None) -> dict[str, Any]:
    p = Path(path)
    shown = str(p.relative_to(root)) if root is not None and p.is_relative_to(root) else str(p)
    return {"path": shown, "size": p.stat().st_size, "sha256": sha256_file(p)}


def _hidden(p: Path, root: Path) -> bool:
    parts = p.relative_to(root).parts if p.is_relative_to(root) else (p.name,)
    return any(part.startswith(".") for part in parts)


def write_manifest(
    path: Path, *, root: Path, config: Path | None, inputs: Iterable[Path], outputs: Iterable[Path],
    extra: Mapping[str, Any],
) -> Path:
    seen: set[str] = set()
    ins = []
    for p in inputs:
        key = str(Path(p).resolve())
        if key not in seen and Path(p).is_file():
            seen.add(key)
            ins.append(file_entry(Path(p)))
    # hidden entries (staging lock, resume records, temporary files) are not outputs
    outs = sorted((file_entry(Path(p), root) for p in outputs if Path(p).is_file() and not _hidden(Path(p), root)),
                  key=lambda e: e["path"])
    doc = {
        "kind": MANIFEST_KIND,
        "schema_version": 1,
        "packages": package_versions(),
        "config": (
            {"path": str(config), "sha256": sha256_file(config), "text": Path(config).read_text(encoding="utf-8")}
            if config is not None and Path(config).is_file() else None
        ),
        "inputs": ins,
        "outputs": outs,
        **extra,
    }
    return atomic_write_text(path, json.dumps(doc, indent=2, default=str) + "\n")
