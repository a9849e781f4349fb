"""The edges readings arrive through: payload decoding, MQTT, stream files and their replay.

- ``ingest`` decodes a message into a reading; ``ingest_limits`` holds the bounds and the
  reasons a message is refused; ``rejection_count`` counts the refusals.
- ``mqtt_names`` (broker URLs, topic names), ``mqtt_settings`` (settings and the paho
  client), ``mqtt_source`` (inbound, manual acknowledgement), ``mqtt_publisher`` (outbound).
- ``streams`` reads and writes stream files (.jsonl); ``replay`` publishes them to a broker.
"""
