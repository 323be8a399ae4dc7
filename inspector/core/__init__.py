"""The numeric core: arrays in, arrays out. No paths, clocks or terminals.

Patch features, image measures and camera conditions, density models, per-cell scoring,
calibration, regimes, event grouping, and the baseline that ties them together.
"""
