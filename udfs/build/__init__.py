"""The builder: sources, the five compress passes (profile, sketch, select, verify, commit)."""
