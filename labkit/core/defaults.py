"""Defaults recorded with every prediction, kept apart so the command line can show them without loading numpy."""

DEFAULT_SEED = 1459
"""Monte Carlo seed of the tolerance bands (recorded with every session)."""
DEFAULT_SAMPLES = 2000
"""Monte Carlo sample count of the tolerance bands."""
BAND_PERCENTILES = (5.0, 95.0)
"""The band: 5th to 95th percentile over the samples."""
