"""The default lab configuration and service unit, shipped inside the package (``lenslane init`` copies the config)."""
