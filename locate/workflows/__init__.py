"""What each command does, callable from Python (layer 7: recordings in, result dicts out).

* :mod:`~locate.workflows.fixing` - fixes of events, spans and windows; the sound-speed
  conditions of a site; the result document.
* :mod:`~locate.workflows.sweep` - every window of a long span, fast.
* :mod:`~locate.workflows.level` - source power and receiver levels for a fix.
* :mod:`~locate.workflows.sync_site` - clock calibration around the site file.
* :mod:`~locate.workflows.batch` - many runs from one manifest, locally or on a cluster.

The command line (:mod:`locate.cli`) and the public API (:mod:`locate.api`) call these.
"""
