"""Reporting: trade notation, the story of an order as data, and its renderings."""
