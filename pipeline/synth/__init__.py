"""The synthetic star and its fictional magnetograph (demo data and closed-loop truth).

The scenario: the star *Tessaly* (a Sun-like dwarf of our own invention) observed
from the Earth's orbit by the *Kestrel Vector Magnetograph* (KVM) of the fictional
*Halden Ridge Observatory*.  Invented data, for the demo and the tests only.
"""
