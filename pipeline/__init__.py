"""relaxline: relaxometry fitting pipeline."""
