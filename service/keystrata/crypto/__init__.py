"""Cryptography for keystrata. Only :mod:`keystrata.crypto.hazmat` touches primitives."""
