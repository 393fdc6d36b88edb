"""twin.bench."""
