"""twin.demo."""
