"""One node's life: init and open, key-encryption-key rotation, reseal, dispatch of peer
messages to the areas, and the background loops."""
