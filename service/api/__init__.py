"""The HTTP API: one router module per resource; ``service.app`` assembles them."""
