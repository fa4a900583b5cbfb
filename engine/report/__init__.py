"""Reporting: the trade's notation (``notation``), an order's story as plain data (``story``), and its text (``text``).

An HTML renderer sits beside ``text`` and consumes the same data.
"""
from lenslane.report.story import configurations, order_story
from lenslane.report.text import render_configurations, render_text

__all__ = ["configurations", "order_story", "render_configurations", "render_text"]
