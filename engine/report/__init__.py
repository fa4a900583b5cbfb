"""Reporting: the trade's notation (``notation``), an order's story as plain data (``story``), and its text (``text``).

The order page (:mod:`lenslane.web.page`) renders the same data as HTML, with the
lens pictures of ``pictures``.
"""
from lenslane.report.story import configurations, order_story
from lenslane.report.text import render_configurations, render_text

__all__ = ["configurations", "order_story", "render_configurations", "render_text"]
