"""Fixtures of the daemon tests; the helpers live in ``driver.py``."""
from tests.system.driver import fault_plugin  # noqa: F401  (a fixture)
