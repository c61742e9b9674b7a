"""Bundled classifiers stages."""

STAGES: list[type] = []
