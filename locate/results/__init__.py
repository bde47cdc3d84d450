"""Result documents (layer 6): schema ``tdoa-result/1`` and its writers.

* :mod:`~locate.results.documents` - building, checking and reading result dicts, CSV rows,
  the same-site check, and the writers (through :func:`locate.common.write_atomic`).
* :mod:`~locate.results.geojson` - RFC 7946 GeoJSON of fixes, ellipses, tracks and mics.
"""
