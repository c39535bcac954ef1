"""A network of ``keystrata serve`` processes on loopback, for tests, benchmarks, the load
test and the demo.

It binds 127.0.0.1 only and stops what it starts; nothing in the service imports it.

- :mod:`keystrata.loopback.pki`: a PKI folder made at run time for node and client names.
- :mod:`keystrata.loopback.configs`: node configuration files.
- :mod:`keystrata.loopback.processes`: free ports, ``keystrata`` CLI runs, node processes
  (start, wait until they answer, stop, SIGKILL).
- :mod:`keystrata.loopback.network`: a relay and two stations, started, provisioned
  through the operator API, fed with link key, stopped.
"""
