"""Reporting: the trade's notation (``notation``), an order's story as plain data (``story``), and its text (``text``).

An HTML renderer sits beside ``text`` and consumes the same data.
"""
from lenslane.report.story import order_story
from lenslane.report.text import render_text

__all__ = ["order_story", "render_text"]
