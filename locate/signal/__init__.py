"""Signal processing on recorded blocks (layer 3: pure, no file I/O).

* :mod:`~locate.signal.delays` - time differences of arrival (GCC-PHAT, maximum-likelihood
  refinement) with their covariance and quality; one span.
* :mod:`~locate.signal.windowed` - the same estimator over many sliding windows at once, with
  its per-chunk work in :mod:`~locate.signal.window_core` and :mod:`~locate.signal.window_peaks`.
* :mod:`~locate.signal.events` - onset detection; :mod:`~locate.signal.event_scan` streams it
  over recordings of any length; :mod:`~locate.signal.event_choice` picks events to fix.
* :mod:`~locate.signal.echoes` - does a fix agree with the order the mics first heard it?
"""
