"""Benchmarks behind ``matcher bench``; one module each, with ``register(subparsers)``."""
