"""Review pages served by the service."""
