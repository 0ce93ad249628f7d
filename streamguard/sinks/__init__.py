"""Where events go: the MQTT publisher fed by the SQLite outbox, and the JSONL audit file."""
