"""whirlwatch: condition monitoring for rotating machinery.

The numerical core (``spectrum``, ``speed``, ``orders``, ``analysis``, ``margins``,
``zones``, ``growth``, ``health``, ``alarms``, ``modes``) is pure: arrays and dataclasses
in, dataclasses out. I/O (MQTT, SQL, files, clock) sits at the edges (``ingest``,
``service``, ``store``, ``streams``, ``cli``).
"""

__version__ = "0.1.0"
