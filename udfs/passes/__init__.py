"""The builder: sources, the five compress passes (profile, sketch, select, encode, commit)."""
