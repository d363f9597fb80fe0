"""The HTML report of a run: one self-contained file for decision support.

:func:`build_report` reads the tables and ``manifest.json`` of one run folder (a finished
run, or a partial folder still being written: only the folder given is read) and returns
one HTML document.  Everything it needs is inside it: the style sheet inline, every plot
an inline base64 PNG drawn with matplotlib's Agg renderer (no pyplot, no global backend
switch), a few lines of inline JavaScript that sort tables by a click on a column
header; no external URL, font or script, so the file opens offline and can be mailed.

The report opens with the caution (:data:`quakefolio.pipeline.caution.CAUTION`), then a
band of key figures, then one ``<section id="...">`` per topic (:data:`SECTIONS`).  A
section whose tables are absent from the run (an ingest-mode run has no
disaggregation; a run without the event-based stage has no portfolio loss curves) is
still present, holding a note that says why.  A section that fails to draw holds a note
with the error instead of breaking the whole report.

:func:`write_report` writes it atomically
(:func:`quakefolio.pipeline.io.store.atomic_write_text`), and only to a new file or over an
earlier report of ours (:func:`report_target`: a report carries :data:`REPORT_MARKER` in
its head); a symbolic link, a folder, a device or any other file is refused.

The report reads the run folder only (:class:`quakefolio.pipeline.io.store.RunFolder`): the
assets and fragility classes come from the run's ``run_assets`` and ``run_fragility``
tables, never from the user's input files; a run written before those tables existed
gets a one-line note in the sections that need them.

Layout: :mod:`~quakefolio.pipeline.report.document` (the document, writing),
``sections_*`` (one module per group of sections), :mod:`~quakefolio.pipeline.report.figures`
(matplotlib figures), :mod:`~quakefolio.pipeline.report.html` (style, tables, formats),
:mod:`~quakefolio.pipeline.report.context` (the run as the report reads it).
"""
from __future__ import annotations

from quakefolio.pipeline.report.context import MAX_TABLE_ROWS, TOP_ASSETS
from quakefolio.pipeline.report.document import (REPORT_MARKER, SECTIONS, build_report, default_report_file,
                                                 is_our_report, output_cache, report_target, write_report)

__all__ = ["build_report", "write_report", "report_target", "default_report_file", "is_our_report", "output_cache",
           "REPORT_MARKER", "SECTIONS", "MAX_TABLE_ROWS", "TOP_ASSETS"]
