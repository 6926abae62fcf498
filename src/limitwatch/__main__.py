"""``python -m limitwatch`` runs the same command as the ``limitwatch`` console script."""

from limitwatch.cli import main

main()
