"""Key delivery to SAEs (ETSI GS QKD 014): request and answer formats, Get key, Get key
with key IDs, the slave's station's copy, owned stock, group commit and accounting."""
