"""Natural frequencies (pure): arrays and dataclasses in, frozen dataclasses out.

Four jobs:

- :mod:`monitor.modes.impact`: impact (bump) tests, built on the checks of each hit on
  the force channel (:mod:`monitor.modes.hits`), the frequency response and its noise
  floor (:mod:`monitor.modes.frequency_response`, :mod:`monitor.modes.noise`) and the
  damping estimates (:mod:`monitor.modes.damping`: logarithmic decrement, SDOF curve fit);
- :mod:`monitor.modes.runup`: run-up and coast-down passages (Bode data, critical speeds),
  found live by :mod:`monitor.modes.passage_tracker` in the sweeps that
  :mod:`monitor.modes.sweeps` splits a speed history into;
- :mod:`monitor.modes.shift`: identified frequencies against the stored modes;
- :mod:`monitor.modes.skip_bands`: drive speed bands to skip.

:mod:`monitor.modes.peaks` (half-power points, parabolic vertex) serves the first two.
Frequencies in Hz, speeds in Hz (rev/s) unless the name says ``rpm`` (r/min); damping
ratio ``zeta`` as a fraction of critical damping. docs/modes.md describes the methods.
"""
