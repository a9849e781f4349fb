"""The plant's model and the rules every stage shares.

Machines, points and modes (``registry``), their bounds (``bounds``) and the TOML file
(``registry_file``); decoded readings (``readings``); the one unit table (``units``); the
argument checks (``validate``); bearing geometry (``bearing_geometry``); ISO 8601 time
(``timefmt``) and JSON-safe values (``jsonsafe``).
"""
