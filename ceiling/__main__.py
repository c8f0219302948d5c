"""``python -m ceiling`` runs the command line."""

from .cli.main import main

main()
