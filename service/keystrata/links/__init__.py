"""QKD link key: blocks as QKD modules deliver them, ingest, pool levels, and taking
(and destroying) link key bytes by range."""
