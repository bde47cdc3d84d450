"""The client report (layer 8): one self-contained HTML page, or PDF.

* :mod:`~locate.report.build` - the page from a site and its result files.
* :mod:`~locate.report.context` - what the page says (the template's data); its parts in
  :mod:`~locate.report.budget`, :mod:`~locate.report.levels`, :mod:`~locate.report.methods`.
* :mod:`~locate.report.format` - how numbers are written.
* :mod:`~locate.report.chromium` - headless Chromium for PDF and screenshots.

Templates live in ``templates/`` beside these modules.
"""
