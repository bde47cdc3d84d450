"""tdoa - find where a sound came from.

Public API (see docs/ for the methods and their sources):

* :mod:`locate.air` - sound speed, time of flight with wind, atmospheric absorption
* :mod:`locate.site` - site files (TOML) and their validation
* :mod:`locate.audio` - reading synchronised recordings
* :mod:`locate.delays` - time differences of arrival (GCC-PHAT) with their uncertainty
* :mod:`locate.fix` - stationary-source least-squares locator
* :mod:`locate.track` - moving-source track from emission-time positions
* :mod:`locate.uncertainty` - confidence ellipses, Cramer-Rao bound, GDOP
* :mod:`locate.levels` - source level and receiver prediction
* :mod:`locate.synth` - exact simulator for tests and demos
"""

__version__ = "0.1.0"
