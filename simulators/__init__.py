"""Simulated robots for demos and tests: the rigid models of :mod:`shadow.robots` plus the effects they leave out.

Modules: :mod:`simulators.integrators` (fixed-step methods), :mod:`simulators.effects` (friction, heating,
compliance, sensors), :mod:`simulators.plant` (the plant), :mod:`simulators.trajectories` (test cycles),
:mod:`simulators.controller` (PID with model feed-forward), :mod:`simulators.run` (closed-loop runs).
Nothing here is imported by :mod:`shadow`.
"""
