"""``python -m matcher`` runs the command line."""

from matcher.cli import main

if __name__ == "__main__":  # pragma: no cover - exercised through subprocess tests
    raise SystemExit(main())
