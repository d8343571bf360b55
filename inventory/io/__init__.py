"""Reading and writing only: CSV tables against their schemas, point clouds, CRS, rasters,
atomic writes. No rule of the trade lives here."""
