"""Load test of key delivery: a relay and two stations as real
``keystrata serve`` processes on loopback with mutual TLS, the stations with two uvicorn
workers each on PostgreSQL, and many concurrent SAE clients taking keys at station A
(Get key) and fetching them at station B (Get key with key IDs).

Run with ``python -m loadtest`` (``--help`` for options) or ``make load``. It is a
script, not a test: ``tests/e2e/test_loadtest_quick.py`` runs its ``--quick`` mode.
"""
