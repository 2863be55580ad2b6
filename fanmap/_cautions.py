"""The safety cautions shown by the command line, the report and the README.

fanmap only analyses data; these remind the user where the measurement itself
can hurt someone or damage a device.  They never replace local rules.
"""

CAUTIONS = (
    "fanmap analyses data; it drives no instrument and sets no limit for one.",
    "Superconducting magnets store large energies: ramp rates, quench precautions and "
    "stray-field limits are set by your lab's rules and its safety officer.",
    "Cryogens (liquid helium and nitrogen) cause cold burns and displace oxygen: handle them "
    "only as your local rules and training allow.",
    "Gate dielectrics break down at fields of order 1 V/nm (SiO2, hBN; from memory): any "
    "field estimate fanmap reports is a guide, not a safe limit. Use your lab's own limits.",
)
