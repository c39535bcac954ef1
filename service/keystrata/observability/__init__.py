"""Observability of one node: Prometheus metrics (database-derived families read at
scrape time, request latency per process) and the readiness checks behind
``/api/v1/health/ready``. Nothing here ever reads key material or key IDs."""
