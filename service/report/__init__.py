"""The report kit: offline HTML pages from Jinja2 templates, one style sheet and the SVG charts
the pages share (root-cause groups, drift, fix effects).

A page is one self-contained file: the style sheet is inlined and charts are inline SVG, with no
scripts, fonts, images or links to fetch, so it can be mailed or archived as it is. Templates
autoescape every value; chart helpers escape every text they draw. A page's numbers are prepared
by the subpackage that owns them and passed in as plain values and data frames.

May import: errors, files.
"""

from causeline.service.report import charts
from causeline.service.report.page import render_page, write_page

__all__ = ["charts", "render_page", "write_page"]
