"""Console-script entry point of sagfit, kept outside the package on purpose.

Importing the package loads numpy and scipy (a few hundred milliseconds); a Ctrl-C in
that window would otherwise end in a Python traceback. Here it ends in one line and
exit status 130, like a Ctrl-C anywhere else.
"""

import sys


def main() -> None:
    try:
        from sagfit.cli import run_program
    except KeyboardInterrupt:
        sys.stderr.write("error: interrupted\n")
        sys.exit(130)
    run_program()
