"""Reading the survey from disk (layer 3: the input edge).

* :mod:`~locate.io.site` - site files (TOML) into validated dataclasses; with
  :mod:`~locate.io.site_tables` (one table each) and :mod:`~locate.io.site_fields` (typed,
  field-named getters).
* :mod:`~locate.io.toml` - TOML reading and writing.
* :mod:`~locate.io.audio` - the recordings on one common time base, in spans or blocks;
  :mod:`~locate.io.wav_header` checks WAV headers against the file size.
* :mod:`~locate.io.sketch` - what a map is drawn over: a georeferenced image, outlines, GeoJSON.
"""
