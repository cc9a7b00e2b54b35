"""The ``matchbay`` command: parses options, calls the pipeline, prints. No RF logic here.

Each sub-command lives in its own module in this package and registers itself on
:data:`app`; :func:`main` turns every :class:`~pipeline.errors.MatchbayError` into one
line on stderr and exit status 2.
"""

from __future__ import annotations

import sys

import typer

from pipeline.errors import MatchbayError

app = typer.Typer(
    name="matchbay",
    help="Match antennas to 50 ohm from measured S11: de-embed, L-network match, log a lot.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
)

# Sub-command modules register themselves on `app` when imported (this order is --help's).
from pipeline.cli import lot_cmd  # noqa: E402,F401  (lot, demo)
from pipeline.cli import match_cmd  # noqa: E402,F401
from pipeline.cli import fixture_cmd  # noqa: E402,F401
from pipeline.cli import results_cmd  # noqa: E402,F401
from pipeline.cli import report_cmd  # noqa: E402,F401
from pipeline.cli import watch_cmd  # noqa: E402,F401
from pipeline.cli import measure_cmd  # noqa: E402,F401


def main(argv: list[str] | None = None) -> int:
    """Entry point of the console script; returns the exit status."""
    try:
        app(args=argv, standalone_mode=False)
    except MatchbayError as error:
        print(f"matchbay: {error}", file=sys.stderr)
        return 2
    except typer.Exit as done:
        return done.exit_code
    except typer.Abort:
        print("matchbay: aborted", file=sys.stderr)
        return 130
    except typer.TyperException as error:     # usage errors: bad or missing options
        show = getattr(error, "format_message", None)
        print(f"matchbay: {show() if show else error}", file=sys.stderr)
        return 2
    return 0


if __name__ == "__main__":
    sys.exit(main())
