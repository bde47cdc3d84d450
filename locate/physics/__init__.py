"""The physics of outdoor sound (layer 1: imports only :mod:`locate.errors`).

* :mod:`~locate.physics.air` - speed of sound (Cramer 1993), time of flight in a uniform wind,
  atmospheric absorption (ISO 9613-1:1993).
* :mod:`~locate.physics.bands` - octave bands, A- and C-weighting, band levels of a signal,
  background noise.
* :mod:`~locate.physics.levels` - source sound power, level at a receiver, barrier screening.

Pure numpy; every function broadcasts.
"""
