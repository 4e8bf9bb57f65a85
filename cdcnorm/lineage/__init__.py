"""Column lineage over SQL models."""
