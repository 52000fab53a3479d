"""The input edge: confined reads, tile catalog, raster windows and mosaics, region files."""
