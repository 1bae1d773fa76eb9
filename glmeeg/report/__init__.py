"""What a researcher reads: the HTML report (``html``), the methods paragraph (``methods``) and
the figures (``figures``; matplotlib is imported inside the functions that draw)."""

from .html import render_report
from .methods import methods_paragraph

__all__ = ["render_report", "methods_paragraph"]
