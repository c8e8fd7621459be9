"""The ``shadow`` command. Each sub-command lives in its own module with a ``register`` function.

Errors raised on purpose (:class:`shadow.errors.ShadowError`) end the command with a one-line
message on stderr and exit code 2; argparse's own usage errors also exit with 2.
"""

from __future__ import annotations

import os

# The estimator's matrices are small: BLAS threads only fight over the cores (measured up to 25x slower
# with the default thread count on a 2-core machine). Must be set before numpy is first imported.
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse  # noqa: E402
import logging  # noqa: E402
import sys  # noqa: E402
from collections.abc import Callable, Sequence  # noqa: E402

from shadow import __version__  # noqa: E402
from shadow.errors import ShadowError  # noqa: E402

Handler = Callable[[argparse.Namespace], int]


def build_parser() -> argparse.ArgumentParser:
    """The full argument parser, every sub-command registered."""
    from shadow.cli import analyze, commission, demo, report, robot, serve

    parser = argparse.ArgumentParser(
        prog="shadow",
        description=(
            "Follow running parallel robots against their physical model and report when one drifts "
            "from its healthy self. Advisory only: shadow never sends anything to a robot controller."
        ),
    )
    parser.add_argument("--version", action="version", version=f"shadow {__version__}")
    parser.add_argument("-v", "--verbose", action="count", default=0, help="more log output (repeatable)")
    commands = parser.add_subparsers(dest="command", metavar="COMMAND", title="commands")
    commands.required = True
    for module in (demo, serve, robot, commission, analyze, report):
        module.register(commands)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``shadow`` console script."""
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(
        level=logging.WARNING - 10 * min(args.verbose, 2),
        format="%(asctime)s %(levelname)s %(name)s: %(message)s",
    )
    handler: Handler = args.handler
    try:
        return handler(args)
    except ShadowError as exc:
        print(f"shadow {args.command}: error: {exc}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
