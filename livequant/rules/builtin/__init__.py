"""The built-in decision rules, each a plugin like a user's (one module each).

Registered by :class:`~livequant.rules.manager.RuleManager` under the names of
:data:`~livequant.rules.manager.BUILTIN_RULES` and blockable by those names
(``rules.enabled``, ``rules.blocked``).  Thresholds: ``[rules.NAME]`` in
``config/default.toml``.

============  ==========================  ===========================================
name          kind(s)                      what it flags
============  ==========================  ===========================================
domain_walls  ``domain-wall``              the frame's tanh wall fit, as a band along it
vortex_cores  ``vortex``, ``antivortex``   winding +1 / -1 of the displacement direction
interfaces    ``interface``                a step of a descriptor across lattice rows
anomalies     ``anomaly``                  cells far from the session's running statistics
feature_      ``wall-moved``,              a wall that moved, a core that appeared or
tracks        ``core-appeared``,           vanished, across frames of one specimen region
              ``core-vanished``            (tracks in ``context.tracks``)
============  ==========================  ===========================================
"""
