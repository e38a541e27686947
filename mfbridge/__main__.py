"""``python -m mfbridge ...``: the ``mfbridge`` console script without needing it on PATH."""

from mfbridge.runs.cli import main

if __name__ == "__main__":
    main()
