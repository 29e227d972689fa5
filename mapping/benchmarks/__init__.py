"""Benchmarks behind ``lodemap bench`` (one module a target)."""
