"""twin.performance."""
