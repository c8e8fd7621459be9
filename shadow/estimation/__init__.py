"""Estimation: signal conditioning, Kalman filtering of payload and friction, commissioning (numerical core)."""
