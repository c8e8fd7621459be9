"""Ingest: wire-format codecs (pure) and the MQTT client (adapter)."""
