"""``python -m filial``: the same as the ``filial`` command."""

from .cli import main

if __name__ == "__main__":
    raise SystemExit(main())
