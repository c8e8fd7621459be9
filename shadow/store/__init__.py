"""Store: database schema, migrations and repositories (adapter)."""
