"""Stage 5, what a run tells people and scripts: JSON, Markdown, plots."""
