"""Quality-flag bits shared by every operator (CF ``flag_masks`` / ``flag_meanings``).

A flag is a per-(profile, channel) integer bitmask; zero means "use it".
"""

from __future__ import annotations

import numpy as np

INVALID_INPUT = 1
"""Non-finite input, or input outside the physical validity rules of the model."""
OUTSIDE_TRAINING_BOUNDS = 2
"""A variable (at some level) outside the per-variable range the emulator was trained on."""
NOVEL_STATE = 4
"""Multivariate novelty: the state is farther from the training set than any training state."""
PHYSICS_FALLBACK = 8
"""The value was recomputed by the physical model instead of the emulator."""
SUPERSATURATED = 16
"""Specific humidity above saturation over liquid water at some level (Bolton 1980): the
value is computed (the clear-sky model is defined for any q < 0.1) but the state is one a
clear-sky model does not represent."""

LARGE_UNCERTAINTY = 32
"""The emulator's own uncertainty (one sigma) exceeds the threshold its recipe set."""
UNUSUAL_TROPOPAUSE = 64
"""The temperature at the lapse-rate tropopause is outside its training range for that level."""

ENVELOPE = OUTSIDE_TRAINING_BOUNDS | NOVEL_STATE | LARGE_UNCERTAINTY | UNUSUAL_TROPOPAUSE
"""The emulator's own tests (outside what it learned): the bits ``fallback="physics"`` recomputes."""

FLAG_MASKS = np.array(
    [INVALID_INPUT, OUTSIDE_TRAINING_BOUNDS, NOVEL_STATE, PHYSICS_FALLBACK, SUPERSATURATED, LARGE_UNCERTAINTY,
     UNUSUAL_TROPOPAUSE],
    dtype=np.int32,
)
FLAG_MEANINGS = ("invalid_input outside_training_bounds novel_state physics_fallback supersaturated "
                 "large_uncertainty unusual_tropopause")
FLAG_DESCRIPTIONS = {
    "invalid_input": "non-finite input or outside the physical validity rules",
    "outside_training_bounds": "a variable outside its per-level training range",
    "novel_state": "state farther from the training set than any training state",
    "physics_fallback": "value recomputed by the physical model",
    "supersaturated": "humidity above saturation over liquid water at some level; value computed",
    "large_uncertainty": "the emulator's uncertainty exceeds its recipe's threshold",
    "unusual_tropopause": "temperature at the lapse-rate tropopause outside its training range",
}


def flag_attrs() -> dict:
    """CF attributes for a ``quality_flag`` variable."""
    return {
        "long_name": "quality flag bitmask",
        "flag_masks": FLAG_MASKS,
        "flag_meanings": FLAG_MEANINGS,
        "comment": "; ".join(f"{k}: {v}" for k, v in FLAG_DESCRIPTIONS.items()),
    }
