"""``python -m dnmr`` runs the command line."""
from .cli import main

main()
