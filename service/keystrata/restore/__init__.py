"""Restore detection: stations compare their consumption points of each pair and hold
a pair whose database went back in time."""
