"""Files beside a categorical GeoTIFF that make a desktop GIS show exactly its classes.

A uint8 GeoTIFF's colour table always has 256 entries (TIFF stores 2**bits of them), and QGIS
3.22 makes one legend class of each entry: 256 classes, of which only the named few mean
anything. Measured with QGIS 3.22 (Debian 12), headless, on our files:

- the internal 256-entry table, with or without category names: 256 classes;
- a raster attribute table (RAT) in the ``.aux.xml``: ignored by 3.22 (256 classes);
- a 4-bit band: 16 classes (and no room for nodata 255);
- a colour table of N entries in the ``.aux.xml`` overrides the internal one: N classes, but
  GDAL then reports N entries to every reader (the transparent nodata entry 255 is gone);
- a layer style ``{name}.qml`` beside ``{name}.tif``: QGIS loads it as the layer's default
  style (``QgsMapLayer::loadDefaultStyle``, also in current releases): exactly our classes.

So each categorical map gets (besides the COG's own 256-entry table, which GDAL readers and
rasterio keep reading as before):

- ``{name}.tif.aux.xml`` (GDAL's PAM format): the band description, the category names, and a
  thematic raster attribute table (value, class, red, green, blue, alpha), which GDAL,
  ``gdalinfo`` and other GIS read, and which current QGIS releases (3.30 and later) prefer to
  the colour table when they build a paletted renderer without a style file
  (``QgsRasterRendererRegistry::defaultRendererForDrawingStyle``);
- ``{name}.qml``: a QGIS layer style with a paletted renderer of exactly the named classes.

Nodata (255) stays transparent: the GIS draws it as its canvas, as for any other layer.
"""

from __future__ import annotations

from pathlib import Path
from xml.sax.saxutils import escape, quoteattr

from ..categories import Category, hex_to_rgba
from .atomic import atomic_write_text
from .names import aux_path, style_path

__all__ = ["pam_xml", "qml_text", "write_category_sidecars"]

# GDAL's RAT field types (GFT_*) and usages (GFU_*), as in gdal.h
_INTEGER, _STRING = 0, 2
_RAT_FIELDS = (("value", _INTEGER, 5), ("class", _STRING, 2), ("red", _INTEGER, 6), ("green", _INTEGER, 7),
               ("blue", _INTEGER, 8), ("alpha", _INTEGER, 9))  # 5 MinMax, 2 Name, 6-9 Red..Alpha


def _rat_xml(categories: tuple[Category, ...]) -> str:
    fields = "".join(
        f'      <FieldDefn index="{i}"><Name>{n}</Name><Type>{t}</Type><Usage>{u}</Usage></FieldDefn>\n'
        for i, (n, t, u) in enumerate(_RAT_FIELDS))
    rows = "".join(
        f'      <Row index="{i}"><F>{c.code}</F><F>{escape(c.name)}</F>'
        + "".join(f"<F>{v}</F>" for v in hex_to_rgba(c.colour)) + "</Row>\n"
        for i, c in enumerate(categories))
    return f'    <GDALRasterAttributeTable tableType="thematic">\n{fields}{rows}    </GDALRasterAttributeTable>\n'


def pam_xml(categories: tuple[Category, ...], description: str) -> str:
    """A GDAL PAM sidecar: category names (value i gets the i-th name) and the attribute table."""
    top = max(c.code for c in categories)
    names = {c.code: c.name for c in categories}
    cats = "\n".join(f"      <Category>{escape(names.get(i, ''))}</Category>" for i in range(top + 1))
    return (
        "<PAMDataset>\n"
        '  <PAMRasterBand band="1">\n'
        f"    <Description>{escape(description)}</Description>\n"
        "    <CategoryNames>\n"
        f"{cats}\n"
        "    </CategoryNames>\n"
        f"{_rat_xml(categories)}"
        "  </PAMRasterBand>\n"
        "</PAMDataset>\n"
    )


def qml_text(categories: tuple[Category, ...]) -> str:
    """A QGIS layer style: a paletted renderer of band 1 with exactly these classes."""
    entries = "".join(
        f'        <paletteEntry value="{c.code}" color="{c.colour[:7].lower()}" alpha="{hex_to_rgba(c.colour)[3]}" '
        f"label={quoteattr(c.name)}/>\n" for c in categories)
    return (
        "<!DOCTYPE qgis PUBLIC 'http://mrcc.com/qgis.dtd' 'SYSTEM'>\n"
        '<qgis version="3.22.0" styleCategories="Symbology">\n'
        "  <pipe>\n"
        '    <rasterrenderer type="paletted" band="1" opacity="1" alphaBand="-1" nodataColor="">\n'
        "      <colorPalette>\n"
        f"{entries}"
        "      </colorPalette>\n"
        "    </rasterrenderer>\n"
        "  </pipe>\n"
        "</qgis>\n"
    )


def write_category_sidecars(tif: Path, categories: tuple[Category, ...], description: str) -> list[Path]:
    """Write the ``.aux.xml`` and the ``.qml`` of a categorical map (atomically); return them.

    Call after the GeoTIFF is final: reopening a GeoTIFF for writing deletes its ``.aux.xml``.
    """
    return [atomic_write_text(aux_path(tif), pam_xml(categories, description)),
            atomic_write_text(style_path(tif), qml_text(categories))]
