"""``python -m debtsim``."""

from debtsim.cli import main

main()
