"""Several ``shadow serve`` workers sharing the robots of one plant through PostgreSQL leases.

Each robot is followed by one worker at a time: the worker holding the robot's lease row (owner,
expiry, fencing token) in ``robot_leases``. Workers renew their leases at every heartbeat and balance
the robots among themselves (each aims at ``ceil(robots / live workers)``). The lease's fencing token
is checked in every write transaction of the owner (:mod:`shadow.store.repository`), and the robot's
persistent MQTT session, whose client id comes from the robot id alone, moves with the lease: the new
owner connecting takes the session over, with the messages the broker kept for it.

``balance`` is pure arithmetic, ``leases`` the SQL, ``member`` the worker's thread. deploy/scale-out.md
says how to run it.
"""
