"""Pure numeric functions of the analysis (no I/O, units in names).

- :mod:`agent.dsp.bearing`: defect orders from geometry.
"""
