"""Evaluation reports: what a version does on an evaluation set, and how it differs from another.

``build.build_report`` computes the figures (report.json), ``html.render_html`` draws them
(report.html, self-contained, inline SVG from ``svg``). Plain NumPy: the service only serves
stored reports, and a serving install can still build one.
"""
