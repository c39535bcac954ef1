"""Route modules, one per area of the API."""
