"""Tracking a moving source (layer 4: pure, imports up to fix, never io).

* :mod:`~locate.track.motion` - source paths and the retarded (emission) time.
* :mod:`~locate.track.retarded` - predicted delays of a moving source and their Jacobians.
* :mod:`~locate.track.delays` - windowed delays along a path.
* :mod:`~locate.track.start` - a starting path when per-pair peaks smear.
* :mod:`~locate.track.pathfit` - weighted least-squares path fit.
* :mod:`~locate.track.tracker` - the whole track: path, heading, speed, points.
* :mod:`~locate.track.doppler` - a speed check from a tone's Doppler shift.
* :mod:`~locate.track.bands` - the band above an engine's harmonic lines.
"""
