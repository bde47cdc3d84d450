"""Locating a stationary source (layer 4: pure, imports up to signal, never io).

* :mod:`~locate.fix.solver` - closed-form start, weighted least squares, covariance, bad-mic
  exclusion (:func:`locate_source`).
* :mod:`~locate.fix.integrity` - checks of a fix against the places where TDOA location goes
  wrong quietly (mirror ambiguity, far field, misfit).
* :mod:`~locate.fix.batched` - the same locator vectorised over many delay sets, with its
  Gauss-Newton steps in :mod:`~locate.fix.gauss_newton`.
* :mod:`~locate.fix.air_solve` - sound speed (and wind) solved with the position.
* :mod:`~locate.fix.align` - arrival-aligned analysis windows for continuous sounds.
"""
