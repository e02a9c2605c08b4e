"""``python -m sagfit`` runs the command-line tool."""
from sagfit.cli import run_program

if __name__ == "__main__":
    run_program()
