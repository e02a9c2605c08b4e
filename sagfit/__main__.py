"""``python -m sagfit`` runs the command-line tool."""
from sagfit.cli import main

if __name__ == "__main__":
    main()
