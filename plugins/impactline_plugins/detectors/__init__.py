"""Bundled detectors stages."""

STAGES: list[type] = []
