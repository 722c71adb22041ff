"""Small number helpers shared by the writers (bottom layer, like errors and models)."""

import numpy as np


def nice_ceiling(value):
    """Smallest 1, 2, 2.5 or 5 times a power of ten that is >= value (> 0); 1 for bad input."""
    if not np.isfinite(value) or value <= 0:
        return 1.0
    power = 10.0 ** np.floor(np.log10(value))
    for step in (1.0, 2.0, 2.5, 5.0, 10.0):
        if step * power >= value * (1 - 1e-12):
            return float(step * power)
    return float(10 * power)
