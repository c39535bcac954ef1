"""The ``keystrata`` command line: thin wrappers over the service layer and the SDK."""
