"""shadow: model-based condition monitoring of parallel robots (advisory only).

Data flows one way::

    ingest -> robots (kinematics, dynamics) -> estimation -> detection -> store -> api

``shadow.robots``, ``shadow.estimation`` and ``shadow.detection`` are the numerical core: numpy and
scipy only, SI units, no I/O. ``shadow.ingest``, ``shadow.store``, ``shadow.api`` and ``shadow.cli``
are the adapters. shadow never sends anything to a robot controller.
"""

__version__ = "0.1.0"
