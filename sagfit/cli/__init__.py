"""The ``sagfit`` command line: a thin client of the library.

Each command lives in its own module and registers itself on ``app``; this module
turns every failure into one ``error:`` line on stderr and an exit status.

Exit status: 0 success; 1 something failed a check (``accept``: a unit failed;
``trend``: a DUT flagged); 2 bad input or usage; 3 finished, but some DUTs could not be
decided or fitted; 130 interrupted.
"""

from __future__ import annotations

import re
import sys

import typer

try:  # typer >= 0.20 vendors its own copy of click
    from typer._click import exceptions as _cx
except ImportError:  # pragma: no cover - older typer with the click package
    from click import exceptions as _cx

app = typer.Typer(
    name="sagfit",
    help="Thevenin/Norton equivalents of DC sources from bench readings, with honest "
         "uncertainty.",
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
)



def _version(value: bool) -> None:
    if value:
        from .. import __version__

        sys.stdout.write(f"sagfit {__version__}\n")
        raise typer.Exit(0)


@app.callback()
def _root(version: bool = typer.Option(False, "--version", callback=_version,
                                       is_eager=True, help="Show the version and exit.")
          ) -> None:
    """Thevenin/Norton equivalents of DC sources from bench readings, with honest uncertainty.

    Exit status: 0 success; 1 a check failed (accept: a unit failed; trend: a DUT
    flagged); 2 bad input or usage; 3 done, but some DUTs could not be fitted or decided.
    """


from . import fit_cmd  # noqa: E402,F401  (registers `fit`)

for _mod in ("predict_cmd", "accept_cmd", "history_cmd", "plan_cmd", "design_cmd", "trace_cmd", "pulse_cmd"):
    try:
        __import__(f"{__name__}.{_mod}")
    except ModuleNotFoundError as _exc:  # a command module not written yet
        if _exc.name != f"{__name__}.{_mod}":
            raise


def _one_line(text: str) -> str:
    """The message on one line, each sentence once (click and typer may both add the same
    "Did you mean …?" suggestion)."""
    out: list[str] = []
    for part in re.split(r"(?<=[.?!])\s+", " ".join(str(text).split())):
        if part and part not in out:
            out.append(part)
    return " ".join(out)


def main(argv: list[str] | None = None) -> None:
    """Console-script entry point."""
    from ..core.errors import SagfitError

    try:
        code = app(args=argv, prog_name="sagfit", standalone_mode=False)
    except typer.Exit as exc:
        code = exc.exit_code
    except _cx.NoArgsIsHelpError as exc:
        ctx = getattr(exc, "ctx", None)
        sys.stdout.write((ctx.get_help() if ctx is not None else str(exc)) + "\n")
        code = 0
    except _cx.UsageError as exc:
        hint = ""
        if exc.ctx is not None:
            hint = f" (see '{exc.ctx.command_path} --help')"
        sys.stderr.write(f"error: {_one_line(exc.format_message())}{hint}\n")
        code = 2
    except typer.Abort:
        sys.stderr.write("error: interrupted\n")
        code = 130
    except KeyboardInterrupt:
        sys.stderr.write("error: interrupted\n")
        code = 130
    except SagfitError as exc:
        sys.stderr.write(f"error: {_one_line(exc)}\n")
        code = 2
    except _cx.ClickException as exc:
        sys.stderr.write(f"error: {_one_line(exc.format_message())}\n")
        code = exc.exit_code
    except BrokenPipeError:
        code = 0
    _finish(code or 0)


def _finish(code: int) -> None:
    """Exit with ``code``. As a console program, skip the interpreter's teardown: freeing
    the arrays and lists of a 100,000-DUT batch one by one costs about 0.2 s, and every
    file was already written atomically and flushed. In-process callers (tests) get the
    usual SystemExit."""
    if _AS_PROGRAM:
        import os

        for stream in (sys.stdout, sys.stderr):
            try:
                stream.flush()
            except (OSError, ValueError):
                pass
        os._exit(code)
    sys.exit(code)


_AS_PROGRAM = False


#: Set once the console program has received Ctrl-C (SIGINT).
_INTERRUPTED = False


def interrupted() -> bool:
    """Whether the console program has been interrupted: a failure after Ctrl-C (a
    library half-imported when the signal landed, say) is reported as the interruption
    it is, exit status 130, not as an internal error."""
    return _INTERRUPTED


def _on_sigint(signum, frame):
    global _INTERRUPTED
    _INTERRUPTED = True
    raise KeyboardInterrupt


def run_program() -> None:
    """Entry point of the console script and of ``python -m sagfit``."""
    global _AS_PROGRAM
    _AS_PROGRAM = True
    import signal

    try:
        signal.signal(signal.SIGINT, _on_sigint)
    except ValueError:  # not the main thread: keep Python's own handler
        pass
    _keep_freed_memory()
    main()


#: glibc's mallopt parameters (malloc.h) and the values sagfit's own process uses.
_M_TRIM_THRESHOLD, _M_MMAP_THRESHOLD = -1, -3
_MMAP_THRESHOLD = 32 << 20   # glibc's largest (HEAP_MAX / 2 on 64-bit)
_TRIM_THRESHOLD = 256 << 20


def _keep_freed_memory() -> None:
    """On glibc (Linux), let malloc keep freed memory for reuse in this process.

    By default glibc returns every freed block above 128 kB–32 MB to the kernel at once,
    and the next such block is fresh memory that the kernel must map and zero page by
    page. A large batch frees and allocates such arrays between its stages (the read, the
    two fit threads' slices, the checks, the writer): on 100,000 DUTs the whole
    ``sagfit fit`` was 1.07× slower without this (benchmarks/bench_tricks.py, 2026-12-05,
    a loaded machine; the only process-wide setting left). Blocks up to 32 MB now come
    from the heap,
    and up to 256 MB of freed heap stays mapped until the process ends (it runs one
    command and exits). Only the console program does this; importing sagfit as a library
    leaves the host's malloc alone. Elsewhere (macOS, Windows, musl) nothing happens.
    """
    if not sys.platform.startswith("linux"):
        return
    try:
        import ctypes

        libc = ctypes.CDLL(None)
    except (OSError, ImportError):
        return
    if not hasattr(libc, "gnu_get_libc_version"):  # glibc only (musl has no such call)
        return
    libc.mallopt.argtypes = [ctypes.c_int, ctypes.c_int]
    libc.mallopt(_M_MMAP_THRESHOLD, _MMAP_THRESHOLD)
    libc.mallopt(_M_TRIM_THRESHOLD, _TRIM_THRESHOLD)
