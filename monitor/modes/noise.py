"""Noise level of an impact-test record: the robust spread of its quietest stretch.

An impact record holds a short hit, a ring that decays, and noise before the hit (the
pre-trigger segment) and after the decay. The record is cut into
:data:`NOISE_SEGMENTS` equal segments and the noise level is the smallest robust standard
deviation among them, ``1.4826 x median(|x - median(x)|)`` (the median absolute deviation
scaled to the standard deviation of Gaussian noise). The quietest segment is the
pre-trigger segment or the decayed tail, whichever is quieter; the median ignores the few
samples of a hit that reach into it (breakdown point 50 %).

Used for the hit threshold on the force channel (:mod:`monitor.modes.hits`) and for the
noise floor of the frequency response (:mod:`monitor.modes.frequency_response`).

References
----------
P. J. Rousseeuw and C. Croux, "Alternatives to the median absolute deviation", Journal of
the American Statistical Association 88 (1993): MAD, its consistency factor 1.4826 and its
50 % breakdown point.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import ArrayLike

#: MAD -> standard deviation of Gaussian noise: 1 / Phi^-1(3/4) (Rousseeuw and Croux).
MAD_TO_SIGMA = 1.4826
#: The record is cut into this many segments; the quietest one gives the noise level.
NOISE_SEGMENTS = 8
#: ... but no segment shorter than this many samples (a MAD needs a few samples).
MIN_SEGMENT_SAMPLES = 16


def noise_level(record: ArrayLike) -> float:
    """Robust standard deviation of the quietest of the record's eight segments, in the
    record's unit (0 for a record that is exactly constant over a segment).

    A record shorter than 32 samples is one segment.
    """
    x = np.asarray(record, dtype=float).ravel()
    parts = max(1, min(NOISE_SEGMENTS, x.size // MIN_SEGMENT_SAMPLES))
    return float(min(
        MAD_TO_SIGMA * np.median(np.abs(seg - np.median(seg)))
        for seg in np.array_split(x, parts)
    ))
