"""Subcommands of the ``matcher`` command line, one module each.

Each module defines ``register(subparsers)``. Modules whose names start with
``_`` are helpers and are not registered.
"""
