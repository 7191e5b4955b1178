"""``python -m tbminv``: the command line."""

from tbminv.cli import main

if __name__ == "__main__":
    raise SystemExit(main())
