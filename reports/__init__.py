"""Documents from plain inputs: the per-instrument dossier (Markdown, self-contained HTML), a static site,
publication tables and SVG plots.

Entry points (no database access here; callers build the frozen inputs of :mod:`ivdossier.reports.inputs`,
including the verdicts derived by :mod:`ivdossier.workflows.verdicts`):

- :func:`ivdossier.reports.dossier.dossier_markdown`, :func:`ivdossier.reports.dossier.dossier_html`
- :func:`ivdossier.reports.html.render_html`
- :func:`ivdossier.reports.site.build_site`
- :func:`ivdossier.reports.tables.runs_table`
- :mod:`ivdossier.reports.plots` (figures drawn by :mod:`ivdossier.reports.svgplot`, pure Python)
"""
