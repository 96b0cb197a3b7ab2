"""Shipped case files (TOML); read them with ``harness.grid.cases.shipped``."""
