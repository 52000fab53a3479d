"""The invented demo world (Valdmark Survey Office scenario) and its archive writer."""
