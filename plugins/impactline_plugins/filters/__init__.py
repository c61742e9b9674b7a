"""Bundled filters stages."""

STAGES: list[type] = []
