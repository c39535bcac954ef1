"""The registry: what operators provision (nodes, QKD links, pairs, SAEs, principals),
the use cases that change it, and who a certificate names."""
