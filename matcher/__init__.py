"""matcher: streaming multi-messenger alert matcher for gravitational-wave follow-up.

The public API is small on purpose: localization maps live in :mod:`matcher.sky`,
the coincidence model in :mod:`matcher.coincidence`, host galaxies in
:mod:`matcher.catalog`, and the service in :mod:`matcher.service`.
"""

__version__ = "0.1.0"

__all__ = ["__version__"]
