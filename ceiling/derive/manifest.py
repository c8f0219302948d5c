"""The derive manifest: inputs with checksums, the method and its settings, versions, outputs.

Written last, so a manifest on disk always describes complete layers.
"""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version
from pathlib import Path
from typing import Any

from ..outputs.manifest import write_manifest

__all__ = ["DERIVE_MANIFEST_KIND", "derive_versions", "write_derive_manifest"]

DERIVE_MANIFEST_KIND = "ceiling-derive-manifest"
DERIVE_PACKAGES = ("xclim", "xsdba", "cftime", "pyproj")


def derive_versions() -> dict[str, str]:
    out = {}
    for p in DERIVE_PACKAGES:
        try:
            out[p] = version(p)
        except PackageNotFoundError:
            continue
    return out


def write_derive_manifest(res: Any, plan: Any, *, root: Path, config: Path | None) -> Path:
    """``manifest.json`` in ``root`` for a finished derive (``res``: DeriveResult, ``plan``: DerivePlan)."""
    inputs = plan.baseline.files() + [Path(p) for ch in plan.changes for v in ch.record["variables"].values()
                                      for p in v["historical_files"] + v["future_files"]]
    extra = {
        "kind": DERIVE_MANIFEST_KIND,
        "derive_packages": derive_versions(),
        "grid": {"crs_wkt": res.grid.crs_wkt, "transform": list(res.grid.transform), "width": res.grid.width,
                 "height": res.grid.height},
        "climates": [{"scenario": c.scenario, "climate_model": c.model, "period": c.period} for c in res.climates],
        **res.record,
        "timing_s": {"derive": round(res.seconds, 3)},
    }
    return write_manifest(Path(root) / "manifest.json", root=Path(root), config=config, inputs=inputs,
                          outputs=res.written, extra=extra)
