"""Geometry of the site (layer 2: imports physics and errors).

* :mod:`~locate.geometry.frames` - WGS84 <-> local east-north-up metres (one conversion for the
  whole package), GeoJSON feature helpers.
* :mod:`~locate.geometry.ellipses` - confidence ellipses (the one ellipse function), the
  Cramer-Rao bound, GDOP, pair incidence matrices.

Pure functions; positions are ``(..., 3)`` arrays in metres.
"""
