"""Fixtures of the decision tests."""
from tests.system.driver import fault_plugin  # noqa: F401  (a fixture)
