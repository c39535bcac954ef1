"""keystrata benchmarks: every figure beside its ceiling (``python -m bench``)."""
