"""Ingestion: pure topic and payload handling (topics.py, payload.py) and the MQTT edge (mqtt.py)."""
