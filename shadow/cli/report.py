"""``shadow report``: analyse a recorded run and write a self-contained HTML report (optionally PDF).

``shadow report DESCRIPTION RECORDING -o report.html [--baseline B.json] [--pdf]``
``shadow report DESCRIPTION --database URL | --config FILE --robot ID --from ISO8601 --to ISO8601 -o report.html``

The analysis is that of ``shadow analyze`` (a recording file, or a stored range with the same options); the
page holds the health summary, the validation view (measured against computed efforts with RMS, NRMS and
correlation), payload and friction trends with +-2 std bands and every event with its evidence, contact force and
pose (layout in docs/analysis.md). Plots are embedded, so the file opens anywhere without a network. ``--pdf``
also prints it to PDF next to it when a headless Chromium is
installed. Advisory only: nothing is sent to a controller.
"""

from __future__ import annotations

import argparse
from pathlib import Path

from shadow.analysis.report import DEFAULT_STRETCH_S, build_report, html_to_pdf
from shadow.cli.analyze import add_common_arguments, run_analysis
from shadow.errors import ConfigurationError


def register(commands: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    parser = commands.add_parser(
        "report",
        help="write an HTML report of a recorded run or a stored range",
        description=__doc__,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    add_common_arguments(parser)
    parser.add_argument("-o", "--output", type=Path, required=True, metavar="report.html", help="the HTML file")
    parser.add_argument("--pdf", action="store_true", help="also print it to PDF (needs a headless chromium)")
    parser.add_argument(
        "--stretch-s",
        type=float,
        default=DEFAULT_STRETCH_S,
        metavar="S",
        help=f"length of the validation stretch (default {DEFAULT_STRETCH_S:g} s)",
    )
    parser.set_defaults(handler=run)


def run(args: argparse.Namespace) -> int:
    if not args.stretch_s > 0:
        raise ConfigurationError(f"--stretch-s: must be > 0, got {args.stretch_s}")
    _, monitor, analysis = run_analysis(args)
    page = build_report(monitor, analysis, stretch_s=args.stretch_s)
    try:
        args.output.parent.mkdir(parents=True, exist_ok=True)
        args.output.write_text(page, encoding="utf-8")
    except OSError as exc:
        raise ConfigurationError(f"{args.output}: cannot write the report: {exc.strerror or exc}") from exc
    print(f"report written to {args.output} ({len(analysis.events)} events, {analysis.n_samples} samples)")
    if args.pdf:
        pdf = args.output.with_suffix(".pdf")
        html_to_pdf(args.output, pdf)
        print(f"PDF written to {pdf}")
    return 0
