"""Node to node: the typed peer messages, the transactional outbox, the sender that
delivers it, and the HTTPS client to peers."""
