"""Error model of dh on stable terrain: spread by slope, spatial correlation, standard errors."""
