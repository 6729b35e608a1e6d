"""The report: ``report.html`` and ``plots/*.png`` of a results folder.

Read in this order: :mod:`~runner.report.reading` (files and optional columns),
:mod:`~runner.report.style` (looks, colours, CSS), :mod:`~runner.report.scales` (axis ranges an
outlier cannot flatten), :mod:`~runner.report.plots` (one function per plot),
:mod:`~runner.report.tables` (HTML tables), :mod:`~runner.report.page` (``build_report``, which
assembles the page).
"""
