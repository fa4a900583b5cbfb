"""The built-in stages of lenslane, one small module each, and the optics they need."""
