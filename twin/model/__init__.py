"""twin.model."""
