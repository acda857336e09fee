"""Unit tests: pure functions with fakes."""
