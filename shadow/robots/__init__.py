"""Robot models: description files, kinematics, rigid-body dynamics and drives (numerical core).

numpy only, SI units, no I/O besides reading a description file in :mod:`shadow.robots.description`.
"""
