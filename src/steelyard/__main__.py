"""``python -m steelyard``."""

from steelyard.cli import main

main()
