"""The envelope spectrum of a stored waveform, with the bearing's defect frequencies marked.

The envelope spectrum is computed by the one bearing analysis of the service
(:func:`monitor.analysis.bearings.analyse_bearing`: demodulation band of highest spectral
kurtosis, Hilbert envelope, Hann window); this module only chooses what a chart shows of
it: the spectrum up to a little above the highest line read, and one marker per harmonic
of each defect frequency (BPFO, BPFI, BSF, FTF) and the shaft-speed sidebands of BPFI.

References
----------
R. B. Randall and J. Antoni, "Rolling element bearing diagnostics: a tutorial",
Mechanical Systems and Signal Processing 25 (2011) 485-520: defect frequencies (section
2), envelope analysis (section 3), the sidebands of BPFI at the shaft speed.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from numpy.typing import ArrayLike

from monitor.analysis import bearings
from monitor.model.bearing_geometry import DEFECTS, BearingGeometry, DefectFrequencies

#: The chart's span above the highest marker, as a fraction of it.
SPAN_ABOVE = 0.2


@dataclass(frozen=True)
class Marker:
    """One line a chart marks: ``label`` (``BPFO``, ``2xBPFI``, ``BPFI-fr``...), the
    ``defect`` it belongs to, its ``harmonic`` (0 for a sideband) and ``hz`` (Hz)."""

    label: str
    defect: str
    harmonic: int
    hz: float

    def to_json(self) -> dict[str, Any]:
        return {"label": self.label, "defect": self.defect, "harmonic": self.harmonic, "hz": self.hz}


def defect_markers(freqs: DefectFrequencies, shaft_hz: float, harmonics: int = bearings.HARMONICS) -> list[Marker]:
    """Markers at 1x..``harmonics``x each defect frequency (``freqs`` in Hz) and at BPFI
    -+ the shaft speed ``shaft_hz`` (Hz), in the order of :data:`DEFECTS`."""
    if freqs.unit != "Hz":
        raise ValueError(f"freqs must be in Hz, got {freqs.unit!r}.")
    out: list[Marker] = []
    for name in DEFECTS:
        f = float(getattr(freqs, name))
        for k in range(1, harmonics + 1):
            out.append(Marker(("" if k == 1 else f"{k}x") + name.upper(), name, k, k * f))
        if name == "bpfi":
            out.append(Marker("BPFI-fr", name, 0, f - shaft_hz))
            out.append(Marker("BPFI+fr", name, 0, f + shaft_hz))
    return out


def envelope_view(samples: ArrayLike, fs_hz: float, unit: str, shaft_hz: float,
                  geometry: BearingGeometry) -> dict[str, Any]:
    """The envelope spectrum of an acceleration waveform (``samples`` in ``unit``, ``fs_hz``
    Hz) at shaft speed ``shaft_hz`` (Hz), as JSON: ``freq_hz`` and ``amplitude`` (m/s^2
    peak) up to 1.2 x the highest marker, ``band_hz`` and ``band_source`` of the
    demodulation, ``frequencies_hz`` (per defect), ``indicator_db`` (per defect: the line
    over the spectrum's median, dB) and ``markers``. ValueError as
    :func:`~monitor.analysis.bearings.analyse_bearing` raises it."""
    b = bearings.analyse_bearing(np.asarray(samples, dtype=np.float64), fs_hz, shaft_hz, geometry, unit=unit)
    markers = defect_markers(b.frequencies, b.shaft_hz)
    top = (1.0 + SPAN_ABOVE) * max(m.hz for m in markers)
    f = np.asarray(b.envelope.freq_hz)
    keep = f <= top
    return {
        "unit": b.envelope.unit, "scaling": b.envelope.scaling, "shaft_hz": b.shaft_hz,
        "band_hz": [b.band.lo_hz, b.band.hi_hz], "band_source": b.band.source,
        "resolution_hz": b.envelope.resolution_hz,
        "frequencies_hz": b.frequencies.as_dict(),
        "indicator_db": {k: (None if not np.isfinite(v) else float(v)) for k, v in b.indicator_db.items()},
        "markers": [m.to_json() for m in markers],
        "freq_hz": np.round(f[keep], 4).tolist(),
        "amplitude": [float(f"{v:.5g}") for v in np.asarray(b.envelope.amplitude)[keep].tolist()],
    }
