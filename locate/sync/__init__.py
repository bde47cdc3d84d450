"""Clock synchronisation (layer 4: pure, imports up to fix, never io).

* :mod:`~locate.sync.clocks` - per-mic clock offsets (and drifts) from reference sounds made at
  known points, with their covariance.  The site-file side is in
  :mod:`locate.workflows.sync_site`.
"""
