"""HTTP layer: translates requests to use cases and answers to JSON. No business rules."""
