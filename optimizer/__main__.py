"""``python -m optimizer`` and the ``tierplan`` command run the command line."""

import sys


def run() -> int:
    """The command line; a Ctrl-C while its modules load ends as quietly as one during a
    command (exit 130, one line)."""
    from .blas import one_thread

    one_thread()  # before numpy loads its BLAS
    try:
        from .cli import main
    except KeyboardInterrupt:
        print("tierplan: interrupted", file=sys.stderr)
        return 130
    return main()


if __name__ == "__main__":
    sys.exit(run())
