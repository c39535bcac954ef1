"""keystrata: key manager for QKD networks with an airborne trusted relay."""

__version__ = "0.1.0"
