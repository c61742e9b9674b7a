"""Bundled readers stages."""

STAGES: list[type] = []
