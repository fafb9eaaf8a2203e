"""``python -m replay.cli``: the same as the ``replay`` console script."""

from replay.cli import main

if __name__ == "__main__":
    main()
