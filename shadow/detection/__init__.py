"""Detection: momentum observer, change detection, wear trends, structural modes, health (numerical core)."""
