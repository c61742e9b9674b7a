"""Bundled measures stages."""

STAGES: list[type] = []
