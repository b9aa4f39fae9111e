"""Helpers for tests and benchmarks that run real daemon processes (no test logic of their own)."""
