"""Use cases: each function runs one transaction against a node's database and writes
its ledger entry in that same transaction."""
