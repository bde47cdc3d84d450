"""How good a fix can be, and why (layer 5: pure).

* :mod:`~locate.accuracy.budget` - the uncertainty budget: survey, clock, sound-speed and wind
  uncertainties added to each ellipse; its parts in :mod:`~locate.accuracy.inputs` (what was
  declared), :mod:`~locate.accuracy.propagation` (first order) and
  :mod:`~locate.accuracy.monte_carlo` (JCGM 101 sampling).
* :mod:`~locate.accuracy.next_mic` - is an ellipse set by the array's shape? where would a mic
  help?
* :mod:`~locate.accuracy.timing` - timing models for planning (given or from band and SNR).
* :mod:`~locate.accuracy.plan` - expected ellipses over a map, proposed mics;
  :mod:`~locate.accuracy.plan_site` plans from a site.
"""
