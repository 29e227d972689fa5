"""Simulator (package init placeholder)."""
