"""The numerical core of watcher: numpy and the standard library only; no clock, no I/O.

Modules: ``lsw`` (theory), ``kinetics`` (rate vs temperature), ``icefraction``,
``mix`` (a mix's freezing curve and Tg′), ``thermal`` (product lag), ``population`` (size classes), ``profiles`` (parameter sets),
``integrator`` (the one integrator over series), ``calibrate`` (fit kinetics to a trial).
"""
