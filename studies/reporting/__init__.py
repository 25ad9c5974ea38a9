"""The coordinator's results: derived quantities, figures, the methods paragraph, the report.

Django-free (numpy, pandas, matplotlib and studies.analysis only), usable from a notebook:
:mod:`.quantities` (per-placement quantities the figures need, computed with the analysis
core), :mod:`.figures` (SVG figures), :mod:`.methods` (the methods paragraph),
:mod:`.progress` (reading pace and projected completion).

Django side: :mod:`.report` gathers a study's tables and figures for the dashboard and
renders the self-contained HTML report and its PDF.
"""
