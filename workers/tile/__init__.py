"""One tile, end to end: grid, align, datum, terrain, strata, dh and its one-pass summaries."""
