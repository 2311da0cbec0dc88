"""``python -m corpusprep`` runs the command line."""

from corpusprep.cli import main

main()
