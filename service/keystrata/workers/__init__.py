"""Background work of a node: outbox delivery, the relay's scheduler, segment expiry.
Coordinated through the database (leases, claimed rows), never through process memory."""
