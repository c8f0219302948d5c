"""Messages that GDAL and libtiff print themselves, kept off the terminal unless ``-v`` is given.

Some failures (a full disk above all) make GDAL's error handler and libtiff's default handlers
print straight to the terminal, one line per failed write, before the failure reaches Python
as an exception. The command line reports that exception as one ``error:`` line, so these
messages are sent to nowhere: GDAL's through ``CPL_LOG``, libtiff's by clearing its global
error and warning handlers (libtiff then prints nothing; GDAL still sees each failure).
"""

from __future__ import annotations

import ctypes
import glob
import os

__all__ = ["quiet_native_messages"]


def _libtiff_candidates() -> list[str]:
    """The libtiff libraries loaded in this process (the one GDAL uses)."""
    import rasterio  # loads GDAL and its libtiff

    try:
        with open("/proc/self/maps", encoding="utf-8", errors="replace") as fh:  # Linux: what is loaded
            loaded = {line.split()[-1] for line in fh if "libtiff" in line and "/" in line}
        return sorted(loaded)
    except OSError:  # elsewhere: the copy bundled with rasterio's wheel, if any
        return glob.glob(os.path.join(os.path.dirname(os.path.dirname(rasterio.__file__)), "rasterio.libs", "libtiff*"))


def quiet_native_messages() -> None:
    """Send GDAL's and libtiff's own terminal messages to nowhere (for this process)."""
    os.environ.setdefault("CPL_LOG", os.devnull)
    for name in _libtiff_candidates():
        try:
            lib = ctypes.CDLL(name)
            for fn in ("TIFFSetErrorHandler", "TIFFSetWarningHandler"):
                getattr(lib, fn).restype = ctypes.c_void_p
                getattr(lib, fn)(None)
        except (OSError, AttributeError):
            continue
