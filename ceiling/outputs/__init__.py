"""Writers: atomic files, tables, rasters, the manifest."""
