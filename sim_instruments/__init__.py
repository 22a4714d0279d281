"""Simulated bench: SCPI servers on loopback sharing one physical flyback model.

What a client may know of the simulated bench without starting it (and without importing its
physics) is kept here: the command sets its instruments speak, and what its scope's channels
probe.
"""

#: The command sets the simulated instruments can speak, chosen when the bench starts:
#: ``generic`` (the generic maps) and ``alt``, a second dialect deliberately unlike it (other
#: command trees, headers on replies, unsigned codes, values in other units).
DIALECTS = ("generic", "alt")
#: What the scope's probes see: the primary switch node, and the output rectifier (anode to
#: cathode) when the DUT declares one; the other channels are unprobed.
PRIMARY_CHANNEL = 1
SECONDARY_CHANNEL = 2
