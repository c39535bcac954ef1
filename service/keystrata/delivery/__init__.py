"""Key delivery to SAEs (ETSI GS QKD 014): request and answer formats, routing and the
one refusal, Get status, Get key, Get key with key IDs, the slave's station's copy, key
states, owned stock, group commit, the port to owning stations and accounting."""
