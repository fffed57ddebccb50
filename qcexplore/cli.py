"""The command line: ``qcexplore app``, ``qcexplore report`` and ``qcexplore demo``.

Exit codes: 0 done, 2 bad arguments or data (one line on stderr that names the
problem), 1 an unexpected error (a bug: the traceback is printed).
"""

from __future__ import annotations

import argparse
import sys
import traceback
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any, NoReturn

from qcexplore.app.serve import TOKEN_ENV
from qcexplore.demo import ROLES as DEMO_ROLES
from qcexplore.demo import TITLE as DEMO_TITLE
from qcexplore.errors import QCDataError
from qcexplore.investigation import open_study
from qcexplore.study import Study

_EXAMPLES = """\
examples:
  qcexplore app                                  explore the built-in demo in the browser
  qcexplore demo -o demo.csv                     write the demo data
  qcexplore app demo.csv --value net_g --subgroup round --time taken_at \\
      --factors crew shift nozzle --measured-by crew --lsl 500 --units g
  qcexplore report demo.csv -o report.html --value net_g --subgroup round \\
      --time taken_at --factors crew nozzle shift --measured-by crew --lsl 500
  qcexplore report fills.csv -o fills.html --value weight --time sampled_at \\
      --shifts early=06:00,late=14:00,night=22:00 --factors shift weekday
"""


class _Parser(argparse.ArgumentParser):
    """argparse with one-line errors (exit code 2) instead of the usage block."""

    def error(self, message: str) -> NoReturn:
        self.exit(2, f"{self.prog}: {message} (see {self.prog} --help)\n")


def _names(text: str) -> list[str]:
    return [name.strip() for name in text.split(",") if name.strip()]


def _shifts(text: str) -> dict[str, str]:
    """``"early=06:00,late=14:00"`` to ``{"early": "06:00", "late": "14:00"}``."""
    shifts: dict[str, str] = {}
    for part in _names(text):
        name, sep, clock = part.partition("=")
        if not sep or not name.strip() or not clock.strip():
            raise argparse.ArgumentTypeError(
                f"{part!r} is not NAME=HH:MM; write e.g. early=06:00,late=14:00,night=22:00"
            )
        shifts[name.strip()] = clock.strip()
    if not shifts:
        raise argparse.ArgumentTypeError("give at least one shift, e.g. early=06:00")
    return shifts


def _add_study_options(parser: argparse.ArgumentParser) -> None:
    roles = parser.add_argument_group(
        "study options",
        "Roles of the data's columns. Lists take spaces or commas (--factors crew nozzle); "
        "give DATA before them.",
    )
    roles.add_argument("--value", help="the measured characteristic (numeric column)")
    roles.add_argument("--subgroup", help="column naming the rational subgroup (hour, lot)")
    roles.add_argument("--time", help="timestamps or an order column")
    roles.add_argument(
        "--factors",
        nargs="+",
        default=None,
        metavar="COLUMN",
        help="stratification columns (weekday, hour, day, shift are derived from --time)",
    )
    roles.add_argument(
        "--measured-by",
        nargs="+",
        default=None,
        metavar="COLUMN",
        help="factors that describe how a sample was taken or measured",
    )
    roles.add_argument(
        "--shifts",
        type=_shifts,
        metavar="NAME=HH:MM,...",
        help="shift start clocks, e.g. early=06:00,late=14:00,night=22:00",
    )
    roles.add_argument("--lsl", type=float, help="lower specification limit")
    roles.add_argument("--usl", type=float, help="upper specification limit")
    roles.add_argument("--target", type=float, help="target value")
    roles.add_argument("--units", help="unit of the value, e.g. g")
    roles.add_argument("--sheet", help="Excel sheet name (default: the first)")
    reading = parser.add_argument_group(
        "reading the file",
        "Normally found from the values and reported; give them when the file cannot settle it.",
    )
    order = reading.add_mutually_exclusive_group()
    order.add_argument(
        "--dayfirst", dest="dayfirst", action="store_true", default=None,
        help="dates are written day first (30.03.2024, 30/03/2024)",
    )  # fmt: skip
    order.add_argument(
        "--monthfirst", dest="dayfirst", action="store_false",
        help="dates are written month first (03/30/2024)",
    )  # fmt: skip
    reading.add_argument("--date-format", help="the dates' format, e.g. %%d.%%m.%%Y %%H:%%M")
    reading.add_argument("--decimal", choices=[",", "."], help="the decimal mark")
    reading.add_argument("--encoding", help="the text encoding, e.g. cp1252")


class _RefuseToken(argparse.Action):
    """``--token`` on the command line is refused without repeating it (``ps`` shows argv)."""

    def __call__(self, parser: argparse.ArgumentParser, *args: Any, **kwargs: Any) -> None:
        parser.error(
            "--token is not taken on the command line, where others on this machine can read "
            f"it: put the token in the environment variable {TOKEN_ENV} or in a file given "
            "with --token-file"
        )


def _add_server_options(app: argparse.ArgumentParser) -> None:
    server = app.add_argument_group(
        "server options",
        "Only this machine can open the app unless --host says otherwise. On the network a "
        f"token is needed: from {TOKEN_ENV} or --token-file, or one is made and printed.",
    )
    server.add_argument(
        "--host",
        default="127.0.0.1",
        help="address to listen on (default 127.0.0.1, this machine only; 0.0.0.0 for the "
        "network); the page answers only at this address and localhost",
    )
    server.add_argument("--port", type=int, default=None, help="port (default: a free one)")
    server.add_argument(
        "--token-file",
        metavar="FILE",
        help=f"a file whose first line is the access token (or set {TOKEN_ENV})",
    )
    server.add_argument("--token", nargs="?", action=_RefuseToken, help=argparse.SUPPRESS)
    server.add_argument("--certfile", metavar="PEM", help="TLS certificate: serve https")
    server.add_argument("--keyfile", metavar="PEM", help="private key of the certificate")
    server.add_argument(
        "--max-pages",
        type=int,
        default=None,
        metavar="N",
        help="pages open at once (default: half the free memory over what a page's kernel "
        "takes, about 300 MB plus three times the data; printed at start)",
    )
    server.add_argument(
        "--idle-timeout",
        type=float,
        default=900.0,
        metavar="SECONDS",
        help="shut down the kernel of a closed page after this long (default 900)",
    )
    server.add_argument(
        "--connect-timeout",
        type=float,
        default=120.0,
        metavar="SECONDS",
        help="shut down a kernel whose page never connected after this long (default 120)",
    )
    server.add_argument(
        "--log-folder",
        default="qcexplore-logs",
        metavar="DIR",
        help="folder of investigation logs, where each page autosaves (default: "
        "qcexplore-logs in the current folder)",
    )
    server.add_argument(
        "--log", metavar="FILE", help="open the explorer with an investigation log saved earlier"
    )


def build_parser() -> argparse.ArgumentParser:
    """The ``qcexplore`` argument parser.

    Examples
    --------
    >>> build_parser().parse_args(["demo", "-o", "d.csv"]).output
    'd.csv'
    """
    parser = _Parser(
        prog="qcexplore",
        description="Find out why a measured characteristic varies: control charts, "
        "sources of variation, time structure and capability.",
        epilog=_EXAMPLES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    commands = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    commands.required = True

    app = commands.add_parser(
        "app",
        allow_abbrev=False,  # "--token X" must not be read as "--token-file X"
        help="serve the interactive explorer as a web page",
        description="Serve the explorer as a web page (Voila) and print its address. "
        "Without DATA it opens the built-in demo. Ctrl-C stops the server.",
        epilog=_EXAMPLES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    app.add_argument("data", nargs="?", help="CSV, TSV, Parquet or Excel file (default: demo)")
    _add_study_options(app)
    _add_server_options(app)
    app.add_argument_group("demo (without DATA)").add_argument(
        "--seed", type=int, default=0, help="seed of the demo data (default 0)"
    )

    report = commands.add_parser(
        "report",
        help="write the HTML report (no browser needed)",
        description="Write one self-contained HTML report of the study.",
        epilog=_EXAMPLES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    report.add_argument("data", help="CSV, TSV, Parquet or Excel file")
    report.add_argument("-o", "--output", required=True, help="the HTML file to write")
    report.add_argument("--title", help="title of the report (default: the value and the date)")
    report.add_argument(
        "--log",
        metavar="FILE",
        help="an investigation log saved in the explorer: its settings, "
        "exclusions and notes go into the report",
    )
    _add_study_options(report)

    demo = commands.add_parser(
        "demo",
        help="write the demo data (honey filling line)",
        description="Write the demo data set: a six-nozzle honey filler with a high-reading "
        "crew scale, a drifting nozzle and autocorrelated fill level. CSV, TSV or Parquet, "
        "chosen by the file name.",
        epilog=_EXAMPLES,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    demo.add_argument("-o", "--output", required=True, help="file to write (.csv, .tsv, .parquet)")
    demo.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    demo.add_argument("--days", type=int, default=28, help="length of the record (default 28)")
    return parser


def _flat(names: Sequence[str] | None) -> list[str] | None:
    if names is None:
        return None
    return [part for name in names for part in _names(name)]


def study_roles(args: argparse.Namespace, defaults: dict[str, Any] | None = None) -> dict[str, Any]:
    """The ``Study`` keyword arguments given on the command line (over ``defaults``).

    Examples
    --------
    >>> args = build_parser().parse_args(["report", "x.csv", "-o", "r.html", "--value", "w",
    ...                                   "--factors", "crew,shift", "nozzle", "--lsl", "500"])
    >>> roles = study_roles(args)
    >>> roles["factors"], roles["spec"]
    (['crew', 'shift', 'nozzle'], {'lsl': 500.0})
    """
    roles = dict(defaults or {})
    given = {
        "value": args.value,
        "subgroup": args.subgroup,
        "time": args.time,
        "factors": _flat(args.factors),
        "measured_by": _flat(args.measured_by),
        "shifts": args.shifts,
        "units": args.units,
    }
    roles.update({key: v for key, v in given.items() if v is not None})
    limits = {key: getattr(args, key) for key in ("lsl", "usl", "target")}
    if any(v is not None for v in limits.values()):
        roles["spec"] = {key: v for key, v in limits.items() if v is not None}
    if not roles.get("value"):
        raise QCDataError("--value is required: name the column with the measured values.")
    return roles


def _progress(name: str) -> Callable[[float], None]:
    """A progress callback that writes the share of ``name`` read so far to stderr."""
    shown = {"last": -1}
    live = sys.stderr.isatty()

    def report(fraction: float) -> None:
        percent = int(fraction * 100)
        step = percent if live else percent // 10 * 10
        if step == shown["last"]:
            return
        shown["last"] = step
        start, end = ("\r", "" if percent < 100 else "\n") if live else ("", "\n")
        print(f"{start}reading {name}: {step:3d}%", end=end, file=sys.stderr, flush=True)

    return report


def reading_options(args: argparse.Namespace) -> dict[str, Any]:
    """The ``qx.read`` arguments given on the command line."""
    return {
        "sheet": args.sheet,
        "dayfirst": args.dayfirst,
        "date_format": args.date_format,
        "decimal": args.decimal,
        "encoding": args.encoding,
    }


def load_study(data: str, roles: dict[str, Any], **reading: Any) -> tuple[Study, str]:
    """Read ``data`` (progress on stderr for large files) and build the Study; with it, what
    was found in the file (delimiter, decimal mark, encoding, date order) in one line, for
    the command to say once everything else has passed (a refusal stays one line).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "w.csv"
    >>> _ = p.write_text("w\\n1\\n2\\n3\\n")
    >>> load_study(str(p), {"value": "w"})[0].value
    'w'
    """
    from qcexplore.data.io import describe_reading, read

    frame = read(data, progress=_progress(Path(data).name), **reading)
    return open_study(frame, roles), describe_reading(frame)


def _say_reading(found: str) -> None:
    if found:
        print(f"qcexplore: {found}", file=sys.stderr)


def _run_app(args: argparse.Namespace) -> int:
    from qcexplore.app.logfolder import LogFolder
    from qcexplore.app.serve import (
        AppSettings,
        demo_study,
        free_port,
        read_token,
        serve,
        tls_context,
    )

    # Everything that can be refused is checked before the data are read.
    token = read_token(args.token_file)
    tls = tls_context(args.certfile, args.keyfile)
    for option, seconds in (("--idle-timeout", args.idle_timeout),
                            ("--connect-timeout", args.connect_timeout)):  # fmt: skip
        if not seconds > 0:
            raise QCDataError(f"{option} {seconds:g}: give a number of seconds above 0.")
    if args.max_pages is not None and args.max_pages < 1:
        raise QCDataError(f"--max-pages {args.max_pages}: give at least 1.")
    free_port(args.host, args.port or 0)
    found = ""
    if args.data is None:
        study = demo_study(args.seed, **study_roles(args, DEMO_ROLES))
        title = DEMO_TITLE
    else:
        study, found = load_study(args.data, study_roles(args), **reading_options(args))
        title = Path(args.data).name
    log = None
    if args.log is not None:
        from qcexplore import views
        from qcexplore.investigation_file import open_log

        # Checked as each page will open it, so a log that a page would refuse stops here.
        open_log(args.log, study, views.VIEWS)
        log = str(Path(args.log).resolve())
    folder = LogFolder(args.log_folder)
    settings = AppSettings(title=title, log=log, log_folder=str(folder.root))
    _say_reading(found)
    serve(
        study,
        settings=settings,
        host=args.host,
        port=args.port,
        token=token,
        tls=tls,
        idle_timeout=args.idle_timeout,
        connect_timeout=args.connect_timeout,
        max_pages=args.max_pages,
    )
    return 0


def _run_report(args: argparse.Namespace) -> int:
    study, found = load_study(args.data, study_roles(args), **reading_options(args))
    path = study.report(args.output, log=args.log, title=args.title)
    _say_reading(found)
    print(f"wrote {path}")
    return 0


def _run_demo(args: argparse.Namespace) -> int:
    from qcexplore.demo import filling_line

    path = Path(args.output)
    writers = {".csv": "csv", ".tsv": "tsv", ".txt": "csv", ".parquet": "parquet"}
    kind = writers.get(path.suffix.lower())
    if kind is None:
        raise QCDataError(
            f"-o {args.output}: write the demo as .csv, .tsv or .parquet (by the file name)."
        )
    if args.days < 1:
        raise QCDataError(f"--days {args.days}: give at least 1 day.")
    frame, _ = filling_line(seed=args.seed, days=args.days)
    try:
        if kind == "parquet":
            frame.to_parquet(path, index=False)
        else:
            frame.to_csv(path, index=False, sep="\t" if kind == "tsv" else ",")
    except ImportError as error:
        raise QCDataError(
            f"Writing {path.name} needs {error.name}: pip install 'qcexplore[parquet]'."
        ) from None
    except OSError as error:
        raise QCDataError(f"Cannot write {args.output}: {error.strerror}.") from None
    roles = (
        "--value net_g --subgroup round --time taken_at --factors crew shift nozzle "
        "--measured-by crew --lsl 500 --units g"
    )
    print(f"wrote {path} ({len(frame)} rows); roles: {roles}")
    return 0


_COMMANDS = {"app": _run_app, "report": _run_report, "demo": _run_demo}


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line and return its exit code.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> out = pathlib.Path(tempfile.mkdtemp()) / "demo.csv"
    >>> main(["demo", "-o", str(out), "--days", "1"])  # doctest: +ELLIPSIS
    wrote ...
    0
    """
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
        return _COMMANDS[args.command](args)
    except SystemExit as stop:
        return stop.code if isinstance(stop.code, int) else 2
    except QCDataError as error:
        message = " ".join(str(error).split())
        print(f"qcexplore: {message}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("qcexplore: stopped", file=sys.stderr)
        return 0
    except Exception:
        traceback.print_exc()
        print("qcexplore: unexpected error (the traceback above helps to fix it)", file=sys.stderr)
        return 1
