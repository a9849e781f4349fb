"""The edges readings arrive through: payload decoding, MQTT, stream files and their replay."""
