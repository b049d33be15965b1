"""``python -m ledger`` runs the command-line interface, the same as the ``loopledger`` script."""

from .cli import main

if __name__ == "__main__":
    main()
