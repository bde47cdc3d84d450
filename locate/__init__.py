"""tdoa - find where a sound came from.

Public API (see docs/ for the methods and their sources):

* :mod:`locate.physics.air` - sound speed, time of flight with wind, atmospheric absorption
* :mod:`locate.io.site` - site files (TOML) and their validation
* :mod:`locate.io.audio` - reading synchronised recordings
* :mod:`locate.signal.delays` - time differences of arrival (GCC-PHAT) with their uncertainty
* :mod:`locate.fix.solver` - stationary-source least-squares locator
* :mod:`locate.track.tracker` - moving-source track from emission-time positions
* :mod:`locate.geometry.ellipses` - confidence ellipses, Cramer-Rao bound, GDOP
* :mod:`locate.physics.levels` - source level and receiver prediction
* :mod:`locate.synth` - exact simulator for tests and demos
"""

__version__ = "0.1.0"
