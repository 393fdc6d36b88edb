"""twin.reconcile."""
