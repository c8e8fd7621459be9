"""API: the read-only HTTP application, metrics and dashboard pages (adapter)."""
