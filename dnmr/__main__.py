"""``python -m dnmr`` runs the command line."""
from dnmr.cli import main

main()
