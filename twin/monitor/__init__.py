"""twin.monitor."""
