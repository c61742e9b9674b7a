"""Ready pipeline files shipped with impactline (``default.toml`` is what ``impactline demo`` runs)."""

from pathlib import Path

PIPELINES_DIR = Path(__file__).resolve().parent


def pipeline_path(name: str) -> Path:
    """Return the path of the bundled pipeline file ``name`` (with or without ``.toml``)."""
    stem = name[:-5] if name.endswith(".toml") else name
    return PIPELINES_DIR / f"{stem}.toml"
