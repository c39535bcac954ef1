"""Domain logic: plain Python, no web framework, no ORM."""
