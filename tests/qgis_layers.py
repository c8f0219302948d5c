"""Open raster layers in QGIS as a user does, headless; print what QGIS shows, as JSON.

Run with the Python that QGIS is built for (Debian: ``/usr/bin/python3`` with ``python3-qgis``),
not the project's, and ``QT_QPA_PLATFORM=offscreen``::

    QT_QPA_PLATFORM=offscreen /usr/bin/python3 tests/qgis_layers.py a.tif b.tif ...

For each file: whether the layer is valid, its CRS, the renderer QGIS chose (with the layer's
default style, as when the file is dragged into a project), the renderer's classes (value,
label, colour, alpha), the band's nodata, and the layer drawn one pixel per cell: for each
value in the band, the distinct colours (RGBA) drawn at its cells. Used by
``tests/test_gis_legends.py``; it imports nothing from the project.
"""

import json
import os
import sys
from collections import defaultdict

from qgis.core import QgsApplication, QgsMapRendererSequentialJob, QgsMapSettings, QgsRasterLayer
from qgis.PyQt.QtCore import QSize
from qgis.PyQt.QtGui import QColor


def drawn_colours(layer):
    """Draw the layer one pixel per cell; {cell value: sorted distinct RGBA drawn there}."""
    w, h = layer.width(), layer.height()
    settings = QgsMapSettings()
    settings.setLayers([layer])
    settings.setDestinationCrs(layer.crs())
    settings.setExtent(layer.extent())
    settings.setOutputSize(QSize(w, h))
    settings.setBackgroundColor(QColor(0, 0, 0, 0))
    job = QgsMapRendererSequentialJob(settings)
    job.start()
    job.waitForFinished()
    image = job.renderedImage()
    block = layer.dataProvider().block(1, layer.extent(), w, h)
    seen = defaultdict(set)
    for row in range(h):
        for col in range(w):
            key = "nodata" if block.isNoData(row, col) else str(int(block.value(row, col)))
            c = QColor.fromRgba(image.pixel(col, row))
            seen[key].add((c.red(), c.green(), c.blue(), c.alpha()))
    return {k: sorted(v) for k, v in seen.items()}


def describe(path):
    layer = QgsRasterLayer(path, os.path.basename(path))
    out = {"valid": layer.isValid()}
    if not layer.isValid():
        return out
    renderer = layer.renderer()
    provider = layer.dataProvider()
    out.update(
        crs=layer.crs().authid(), bands=layer.bandCount(), renderer=renderer.type(),
        nodata=provider.sourceNoDataValue(1) if provider.sourceHasNoDataValue(1) else None,
    )
    if renderer.type() == "paletted":
        out["classes"] = [[c.value, c.label, c.color.name(), c.color.alpha()] for c in renderer.classes()]
    out["drawn"] = drawn_colours(layer)
    del layer
    return out


def main(paths):
    app = QgsApplication([], False)
    app.initQgis()
    result = {"qgis": __import__("qgis.core", fromlist=["Qgis"]).Qgis.version()}
    result["layers"] = {p: describe(p) for p in paths}
    sys.stdout.write(json.dumps(result))
    sys.stdout.flush()
    # QGIS can crash while tearing down the application in a script; the answer is out already
    os._exit(0)


if __name__ == "__main__":
    main(sys.argv[1:])
