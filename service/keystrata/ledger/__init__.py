"""The verifiable ledger: entries and their canonical encoding, the RFC 9162 Merkle tree,
appending inside the caller's transaction, signed checkpoints and the auditor's search."""
