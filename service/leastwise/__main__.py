"""``python -m leastwise`` runs the command line."""

from leastwise.cli import main

main()
