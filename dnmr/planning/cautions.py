"""Safety cautions for variable-temperature NMR work: pressure in sealed tubes, freezing, the probe's
range, cryogens, the magnet's field.

They are the usual cautions of the trade, carried by every experiment plan and report; they defer to
the facility's rules, its trained staff and local codes.
"""
from __future__ import annotations

#: The cautions, one paragraph each, in the order a plan and a report list them.
CAUTIONS = (
    "Heating a sealed or capped NMR tube above the boiling point of its solvent builds pressure: the tube"
    " can burst. Work above the boiling point only with tubes made for it and under your facility's procedures.",
    "Freezing the sample can crack the tube; a broken tube in the probe is costly and can be dangerous.",
    "Stay inside the probe's rated temperature range, change the temperature in small steps and let it"
    " settle (ramp slowly); use the gas flow and settings your facility prescribes.",
    "Low temperatures use liquid nitrogen or other cryogens: they cause cold burns, and their boil-off can"
    " suffocate in closed or poorly ventilated rooms. Wear the protective equipment required.",
    "The magnet's field is always on: keep ferromagnetic tools and objects away, and people with pacemakers"
    " or other implants outside the marked field limits.",
    "These notes do not replace training: follow your facility's rules, its trained staff and local codes.",
)
