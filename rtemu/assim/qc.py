"""Quality control of observations before an analysis: reason codes and the screening.

Every (profile, channel) gets one reason code; the first rule that applies wins, in this
order:

====  ==================  ===============================================================
code  meaning             rule
====  ==================  ===============================================================
0     used                passed every check
1     missing             the observation is NaN
2     operator_flag       the operator's quality_flag is nonzero (or its simulated value
                          is not finite) at the background
3     departure           |y - H(xb)| > threshold * sqrt(H B H^T + R)_ii (first-guess check)
====  ==================  ===============================================================
"""

from __future__ import annotations

import numpy as np
import xarray as xr

USED = 0
MISSING = 1
OPERATOR_FLAG = 2
DEPARTURE = 3

REASON_VALUES = np.array([USED, MISSING, OPERATOR_FLAG, DEPARTURE], dtype=np.int8)
REASON_MEANINGS = "used missing operator_flag departure"

#: Default first-guess check threshold, in standard deviations of the expected departure
#: (common practice: 3-5 sigma checks; 5 rejects only gross errors).
DEFAULT_THRESHOLD = 5.0


def screen(observed, simulated, flag, departure_std, threshold=DEFAULT_THRESHOLD):
    """Reason code for each observation.

    Parameters
    ----------
    observed : array_like [N, C]
        Observations y [K]; NaN = missing.
    simulated : array_like [N, C]
        H(xb) at the background [K].
    flag : array_like [N, C]
        Operator quality flag [1]; nonzero = do not use.
    departure_std : array_like [N, C]
        Expected standard deviation of the departure, sqrt(H B H^T + R)_ii [K].
    threshold : float
        Rejection threshold [1] (multiples of ``departure_std``); ``None`` or ``inf``
        switches the departure check off.

    Returns
    -------
    numpy.ndarray [N, C] int8
        Reason codes (see module docstring).
    """
    y = np.asarray(observed, dtype=float)
    hx = np.asarray(simulated, dtype=float)
    reason = np.full(y.shape, USED, dtype=np.int8)
    missing = np.isnan(y)
    flagged = ~missing & ((np.asarray(flag) != 0) | ~np.isfinite(hx))
    reason[missing] = MISSING
    reason[flagged] = OPERATOR_FLAG
    if threshold is not None and np.isfinite(threshold):
        if threshold <= 0:
            raise ValueError(f"qc_threshold must be > 0, got {threshold}")
        rest = reason == USED
        departure = np.where(rest, y - hx, 0.0)
        gross = rest & (np.abs(departure) > threshold * np.asarray(departure_std))
        reason[gross] = DEPARTURE
    return reason


def check_accept_flags(accept_flags) -> int:
    """Validate the bitmask of quality_flag bits that do not reject an observation."""
    if isinstance(accept_flags, bool) or not isinstance(accept_flags, (int, np.integer)) or accept_flags < 0:
        raise ValueError(f"accept_flags must be a non-negative integer bitmask, got {accept_flags!r}")
    return int(accept_flags)


def reason_attrs() -> dict:
    """CF flag attributes of a ``qc_reason`` variable."""
    return {
        "long_name": "reason an observation was used or rejected",
        "flag_values": REASON_VALUES,
        "flag_meanings": REASON_MEANINGS,
    }


def reason_counts(reason: np.ndarray) -> xr.DataArray:
    """Number of observations per reason code, as a DataArray over ``qc_reason``."""
    counts = np.array([(reason == code).sum() for code in REASON_VALUES], dtype=np.int64)
    return xr.DataArray(
        counts,
        dims=("qc_reason",),
        coords={"qc_reason": REASON_MEANINGS.split()},
        attrs={"long_name": "number of observations per quality-control reason"},
    )
