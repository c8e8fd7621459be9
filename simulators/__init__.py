"""Simulated robots for demos and tests: the rigid models of :mod:`shadow.robots` plus the effects they leave out.

Modules: :mod:`simulators.integrators` (fixed-step methods), :mod:`simulators.effects` (friction, heating,
compliance, sensors), :mod:`simulators.plant` (the plant), :mod:`simulators.trajectories` (test cycles),
:mod:`simulators.controller` (PID with model feed-forward), :mod:`simulators.run` (closed-loop runs),
:mod:`simulators.live` (feeds), :mod:`simulators.publish` (MQTT and recordings), :mod:`simulators.sensor_faults`
(faults on published messages), :mod:`simulators.scenario_file` and :mod:`simulators.scenario` (declared scenarios
over long horizons, docs/scenario-file.md).
Nothing here is imported by :mod:`shadow`.
"""
