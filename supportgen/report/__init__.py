"""Stage 5, what a run tells people and scripts: JSON, Markdown, plots."""

from .web import batch_index, part_page

__all__ = ["part_page", "batch_index"]
