"""State detection (pure, no I/O): readings and speeds in, alarm transitions and evaluations out.

- ``evaluator``: :class:`~monitor.detection.evaluator.MachineEvaluator`, the detection
  state of one machine, tying the stages below together;
- ``results``: what it makes of a reading (``ReadingEvaluation``, ``FeatureEvaluation``);
- ``health``: sensor health of a waveform block and of a stream;
- ``margins``: separation margins against API 684 required margins, SDOF amplification;
- ``approach``: how soon a ramping speed brings an excitation into a required band;
- ``resonance``: the resonance-proximity alarms of a machine at each speed;
- ``dwell``: how long an excitation has stayed in a band (dwelling told from passing through);
- ``zones``: ISO 20816-3 severity zones;
- ``features``: the growth features of a reading;
- ``growth``: robust baselines and Theil-Sen trends;
- ``growth_rules``: the amplitude-growth alarm levels of a feature;
- ``growth_watch``: the amplitude-growth state of a machine (which readings each rule sees);
- ``alarms``: the alarm engine (persistence, hysteresis, acknowledgement);
- ``state_json``: exact JSON of the detector state and its format versions;
- ``stored_state``: the detector state as the store keeps it;
- ``kernels``: numba kernels for the hot loops (Theil-Sen selection, block scan);
- ``symptoms`` and ``causes``: the likely-cause hints of a reading (docs/diagnosis.md).

Detection settings are keys of a machine's registry table
(:class:`monitor.model.detection_settings.DetectionSettings`, docs/alarms.md).
"""
