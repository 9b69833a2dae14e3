"""`cuewatch refit` and `cuewatch fits`: rolling-window lens-model fits from bucket statistics."""

from monitor.refit.fits_read import read_fits
from monitor.refit.windows import RefitSummary, refit

__all__ = ["RefitSummary", "read_fits", "refit"]
