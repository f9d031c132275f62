"""``python -m splice`` is the same as the ``splice`` command."""

from .cli import main

if __name__ == "__main__":
    raise SystemExit(main())
