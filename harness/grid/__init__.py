"""Audit grids: case files, tasks, execution backends and the result store."""
