"""Batch reports and comparisons: self-contained HTML pages with inline SVG drawings.

- :mod:`~sensor.shell.report.view`: what a page shows of a replayed batch (``BatchView``)
- :mod:`~sensor.shell.report.envelope`: the envelope of good batches, a batch held against it
- :mod:`~sensor.shell.report.figures`: the drawings (matplotlib, as SVG)
- :mod:`~sensor.shell.report.svg`: a matplotlib figure as an inline ``<svg>`` element
- :mod:`~sensor.shell.report.style`: colours, line styles, markers, the alarm palette
- :mod:`~sensor.shell.report.page`: the pages' HTML and CSS
- :mod:`~sensor.shell.report.build`: the replay sink, pages, files (what the commands and the
  demo call: ``ViewCollector``, ``report_html``, ``comparison_html``, ``write_reports``)
- :mod:`~sensor.shell.report.sources`: historian files and stored batches, replayed into views
- :mod:`~sensor.shell.report.errors`: ``ReportError``

The numbers a page shows are the replay summary's (:func:`sensor.shell.replay.summarise`).
This package imports nothing itself, so that importing its error does not load matplotlib.
"""
