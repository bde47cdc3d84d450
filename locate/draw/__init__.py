"""Figures (layer 7: matplotlib, headless, imported only when a figure is drawn).

* :mod:`~locate.draw.figures` - the site map with fixes or a track, the diagnostics panels,
  saving (atomically) in PNG, SVG or PDF.
* :mod:`~locate.draw.kit` - map furniture: palette, view, scale bar, north arrow, ellipses.
* :mod:`~locate.draw.mapdata` - reading a result for drawing (pure).
* :mod:`~locate.draw.parts` - the track layer, the side column and the zoom inset.
* :mod:`~locate.draw.panels` - per-pair correlation and residual panels.
* :mod:`~locate.draw.plan` - the planning figure.
"""
