"""``sluice`` command line: serve, demo, chart, plan, sources, key.

Exit codes (tested in tests/test_cli.py): 0 ok, 1 unexpected failure (a bug, or the
operating system refused: disk full, port taken), 2 usage (bad arguments, unreadable input
file), 3 config error, 4 the request cannot be planned, 5 a source is unavailable.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import textwrap

EXIT_OK, EXIT_USAGE, EXIT_CONFIG, EXIT_PLAN, EXIT_SOURCE = 0, 2, 3, 4, 5

_EXIT_HELP = """exit codes:
  0  ok
  1  unexpected failure (a bug, or the system refused: disk full, port in use)
  2  usage: bad arguments or an unreadable input file
  3  config error (the message names the file, the key and the fix)
  4  the chart request cannot be planned (the message gives its JSON Pointer)
  5  a source is unavailable (cannot be opened or reached)"""

_ENV_HELP = """environment:
  SLUICE_CONFIG      TOML config file (default: serve the demo DuckDB file)
  SLUICE_DEMO_PATH   demo file used without a config (default data/demo.duckdb)
  SLUICE_<KEY>       override a [server] key, e.g. SLUICE_MAX_LIMIT=5000
  SLUICE_SOURCES__<NAME>__<KEY>
                     override a source key, e.g. SLUICE_SOURCES__DELIVERIES__PATH=/data/d.duckdb
  PORT               default port for `sluice serve` (8000)"""


def _para(text: str) -> str:
    return textwrap.fill(text, 78)


def _positive_int(text: str) -> int:
    try:
        n = int(text.replace("_", "").replace(",", ""))
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number") from None
    if n < 1:
        raise argparse.ArgumentTypeError(f"{text!r} must be at least 1")
    return n


def _positive_float(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number") from None
    if not v > 0 or v == float("inf"):
        raise argparse.ArgumentTypeError(f"{text!r} must be a positive number of seconds")
    return v


def _cmd_serve(args: argparse.Namespace) -> int:
    import uvicorn

    from app.server import uvicorn_options

    if args.config:
        os.environ["SLUICE_CONFIG"] = args.config
    settings = _load(args)  # validate before uvicorn starts: a bad config exits 3, one line
    for flag, key in (("header_timeout_s", "header_timeout_s"), ("max_connections", "max_connections"),
                      ("shutdown_timeout_s", "shutdown_timeout_s")):
        if getattr(args, flag) is not None:  # the command line wins over [server]
            setattr(settings, key, getattr(args, flag))
    # the app logs one JSON line per request itself, so uvicorn's access log is off;
    # header deadline, keep-alive, connection cap and shutdown bound come from [server]
    uvicorn.run("app.main:app", host=args.host, port=args.port, workers=1,
                log_level=args.log_level, access_log=False, **uvicorn_options(settings))
    return EXIT_OK


def _cmd_demo(args: argparse.Namespace) -> int:
    from app.demo import build_demo

    info = build_demo(args.out, rows=args.rows, progress=not args.quiet)
    print(f"wrote {info['rows']:,} rows to {info['path']} in {info['seconds']:.1f} s")
    return EXIT_OK


def _load(args: argparse.Namespace):
    from app.settings import ConfigError, load_settings

    try:
        return load_settings(args.config)
    except ConfigError as e:
        print(f"sluice: config error: {e}", file=sys.stderr)
        raise SystemExit(EXIT_CONFIG) from None


def _read_request(args: argparse.Namespace, prog: str):
    """The chart request of FILE (``-``: stdin), validated; an ``int`` exit code on failure."""
    from pydantic import ValidationError

    from app.problems import loc_to_pointer
    from planner.model import ChartRequest

    try:
        text = sys.stdin.read() if args.file == "-" else open(args.file, encoding="utf-8").read()
    except (OSError, UnicodeDecodeError) as e:
        print(f"{prog}: cannot read {args.file}: {getattr(e, 'strerror', None) or e}",
              file=sys.stderr)
        return EXIT_USAGE
    try:
        body = json.loads(text)
    except json.JSONDecodeError as e:
        print(f"{prog}: not valid JSON: {e}", file=sys.stderr)
        return EXIT_PLAN
    if not isinstance(body, dict):
        print(f"{prog}: the chart request must be a JSON object", file=sys.stderr)
        return EXIT_PLAN
    if args.source:
        body["source"] = args.source
    try:
        return ChartRequest.model_validate(body)
    except ValidationError as e:
        for err in e.errors():
            print(f"{prog}: {loc_to_pointer(tuple(err['loc']))}: {err['msg']}", file=sys.stderr)
        return EXIT_PLAN


def _with_service(args: argparse.Namespace, prog: str, work) -> int:
    """Run ``work(service)`` on a ChartService over the config's catalog (the API's code
    path), mapping refusals to the documented exit codes."""
    from app.catalog import Catalog
    from app.engines import EngineError
    from app.problems import Problem
    from app.service import ChartService
    from planner.errors import PlanError

    catalog = Catalog(_load(args))
    try:
        return work(ChartService(catalog))
    except PlanError as e:
        print(f"{prog}: {e.pointer or '/'}: {e.detail}", file=sys.stderr)
        return EXIT_PLAN
    except EngineError as e:
        print(f"{prog}: source {e.source}: {e.message}", file=sys.stderr)
        return EXIT_SOURCE
    except Problem as e:  # [limits] caps (4xx) or admission/timeouts (5xx)
        where = f"{e.ptr}: " if e.ptr else ""
        print(f"{prog}: {where}{e.detail}", file=sys.stderr)
        return EXIT_PLAN if e.status < 500 else EXIT_SOURCE
    finally:
        catalog.close()


def _cmd_plan(args: argparse.Namespace) -> int:
    req = _read_request(args, "sluice plan")
    if isinstance(req, int):
        return req

    def work(service) -> int:
        for stmt in service.plan_sql(req, args.dialect)["sql"]:
            print(stmt.rstrip(";") + ";")
        return EXIT_OK

    return _with_service(args, "sluice plan", work)


def _cmd_chart(args: argparse.Namespace) -> int:
    from app import answer_text

    req = _read_request(args, "sluice chart")
    if isinstance(req, int):
        return req

    def work(service) -> int:
        result = service.run(req)
        answer = service.to_json(result)
        answer["timing_ms"] = result.timing
        if args.format == "json":
            sys.stdout.buffer.write(answer_text.json_bytes(answer) + b"\n")
        elif args.format == "csv":
            sys.stdout.write(answer_text.csv_text(answer))
        else:
            sys.stdout.write(answer_text.table_text(answer))
        sys.stdout.flush()
        if args.format != "json" and not args.quiet:
            for line in answer_text.notes(answer):  # what could mislead, on stderr
                print(f"sluice chart: {line}", file=sys.stderr)
        return EXIT_OK

    return _with_service(args, "sluice chart", work)


def _cmd_key(args: argparse.Namespace) -> int:
    from app.auth import main as auth_main  # the same code as `python -m app.auth`

    return auth_main(["new"] if args.action == "new" else ["hash", args.key])


def _cmd_sources(args: argparse.Namespace) -> int:
    from app.catalog import Catalog
    from app.engines import EngineError

    catalog = Catalog(_load(args))
    status = EXIT_OK
    try:
        for name in catalog.names():
            cfg = catalog.config(name)
            try:
                entry = catalog.entry(name)
                print(f"{name}\t{cfg.engine}\t{cfg.table}\t{entry.row_count} rows\t"
                      f"{len(entry.schema.columns)} columns")
            except EngineError as e:
                print(f"{name}\t{cfg.engine}\t{cfg.table}\tUNAVAILABLE: {e.message}")
                status = EXIT_SOURCE
    finally:
        catalog.close()
    return status


def build_parser() -> argparse.ArgumentParser:
    fmt = argparse.RawDescriptionHelpFormatter
    p = argparse.ArgumentParser(
        prog="sluice", formatter_class=fmt,
        description=_para("Plan chart requests into grouped SQL and run them where the data lives."),
        epilog="examples:\n"
               "  sluice demo --rows 200000            build data/demo.duckdb\n"
               "  sluice serve --port 8000             API, /docs and the preview page at /\n"
               "  sluice sources --config sluice.toml  check every source answers\n"
               "  sluice plan chart.json --dialect postgres\n"
               "  sluice chart chart.json --format csv\n"
               "  sluice key new                       an API key and its hash\n\n"
               f"{_ENV_HELP}\n\n{_EXIT_HELP}")
    p.add_argument("--version", action="version", version=f"sluice {_version()}")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")
    config_help = "TOML config file (default: $SLUICE_CONFIG, else the demo source)"

    s = sub.add_parser(
        "serve", formatter_class=fmt, help="serve the HTTP API, /docs and the preview page",
        description=_para("Serve the HTTP API (same app as `uvicorn app.main:app`). The config is "
                    "validated first; a bad one exits with code 3 before anything listens."),
        epilog="example:\n  sluice serve --host 0.0.0.0 --port 8080 --config /etc/sluice/sluice.toml"
               f"\n\n{_EXIT_HELP}")
    s.add_argument("--host", default="127.0.0.1", help="address to bind (default 127.0.0.1; "
                   "0.0.0.0 for every interface)")
    s.add_argument("--port", type=int, default=int(os.environ.get("PORT", "8000")),
                   help="TCP port (default $PORT, else 8000)")
    s.add_argument("--config", help=config_help, metavar="FILE")
    s.add_argument("--header-timeout-s", type=_positive_float, metavar="S",
                   help="request line and headers must arrive within S seconds, else 408 "
                   "(default [server] header_timeout_s, 10)")
    s.add_argument("--max-connections", type=_positive_int, metavar="N",
                   help="open connections + running requests; beyond it 503 "
                   "(default [server] max_connections, 1000)")
    s.add_argument("--shutdown-timeout-s", type=_positive_float, metavar="S",
                   help="on SIGTERM wait at most S seconds for running requests "
                   "(default [server] shutdown_timeout_s, 15)")
    s.add_argument("--log-level", default="info",
                   choices=["critical", "error", "warning", "info", "debug"],
                   help="uvicorn's log level (default info)")
    s.set_defaults(func=_cmd_serve)

    d = sub.add_parser(
        "demo", formatter_class=fmt,
        help="build the demo DuckDB file (fictional parcel deliveries)",
        description=_para("Build the deterministic demo DuckDB file: table `deliveries`, a fictional "
                    "parcel-delivery network. The same --rows give the same data every time."),
        epilog="example:\n  sluice demo --rows 50_000 --out /tmp/demo.duckdb"
               f"\n\n{_EXIT_HELP}")
    d.add_argument("--rows", type=_positive_int, default=2_000_000, metavar="N",
                   help="rows to generate (default 2,000,000)")
    d.add_argument("--out", default="data/demo.duckdb", metavar="PATH",
                   help="output file, replaced atomically (default data/demo.duckdb)")
    d.add_argument("--quiet", action="store_true", help="no progress bar")
    d.set_defaults(func=_cmd_demo)

    pl = sub.add_parser(
        "plan", formatter_class=fmt,
        help="print the SQL for a chart request file ('-' = stdin)",
        description=_para("Print the SQL sluice would run for a chart request, each statement "
                    "ending with ';'. Bin limits that come from the data are "
                    "read from the source first, so the SQL shows the real bin layout."),
        epilog="examples:\n"
               "  sluice plan chart.json\n"
               "  echo '{\"source\": \"deliveries\", \"channels\": {\"x\": {\"column\": \"depot\"}, "
               "\"y\": {\"agg\": \"count\"}}}' \\\n"
               "    | sluice plan - --dialect postgres"
               f"\n\n{_EXIT_HELP}")
    pl.add_argument("file", metavar="FILE", help="chart request JSON file, or - for stdin")
    pl.add_argument("--source", metavar="NAME", help="override the request's source")
    pl.add_argument("--dialect", metavar="D",
                    help="target dialect (default: the source's own engine)")
    pl.add_argument("--config", help=config_help, metavar="FILE")
    pl.set_defaults(func=_cmd_plan)

    ch = sub.add_parser(
        "chart", formatter_class=fmt,
        help="run a chart request file ('-' = stdin) and print the answer",
        description=_para("Run a chart request on its source through the same code path as "
                    "POST /v1/chart and print the answer: an aligned table (default), CSV "
                    "(RFC 4180, NULL = empty field) or the API's JSON answer. The table and "
                    "CSV print the answer's values (timestamps as RFC 3339 text); a summary "
                    "line and anything that could mislead (truncation, rows outside limits, "
                    "approximation) go to stderr."),
        epilog="examples:\n"
               "  sluice chart chart.json\n"
               "  echo '{\"source\": \"deliveries\", \"channels\": {\"x\": {\"column\": \"depot\"}, "
               "\"y\": {\"agg\": \"count\"}}}' \\\n"
               "    | sluice chart - --format csv > depots.csv"
               f"\n\n{_EXIT_HELP}")
    ch.add_argument("file", metavar="FILE", help="chart request JSON file, or - for stdin")
    ch.add_argument("--format", choices=["table", "csv", "json"], default="table",
                    help="output format (default table)")
    ch.add_argument("--source", metavar="NAME", help="override the request's source")
    ch.add_argument("--config", help=config_help, metavar="FILE")
    ch.add_argument("--quiet", action="store_true", help="no summary lines on stderr")
    ch.set_defaults(func=_cmd_chart)

    k = sub.add_parser(
        "key", formatter_class=fmt, help="make an API key and its hash for [[keys]]",
        description=_para("`key new` prints a random API key and its SHA-256 hash (put the hash "
                    "in a [[keys]] table, give the key to the client). `key hash KEY` prints a "
                    "salted PBKDF2 hash of a key someone chose. The key itself never belongs "
                    "in the config."),
        epilog="examples:\n  sluice key new\n  sluice key hash 'a passphrase someone chose'"
               f"\n\n{_EXIT_HELP}")
    ksub = k.add_subparsers(dest="action", required=True, metavar="ACTION")
    ksub.add_parser("new", help="a random key and its sha256 hash")
    kh = ksub.add_parser("hash", help="a salted pbkdf2 hash of KEY")
    kh.add_argument("key", metavar="KEY")
    k.set_defaults(func=_cmd_key)

    so = sub.add_parser(
        "sources", formatter_class=fmt, help="list configured sources with row counts",
        description=_para("List each configured source as tab-separated name, engine, table, rows, "
                    "columns; opening every one of them. Exits 5 if any is unavailable."),
        epilog=_EXIT_HELP)
    so.add_argument("--config", help=config_help, metavar="FILE")
    so.set_defaults(func=_cmd_sources)
    return p


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    for dist in ("sluice-charts", "sluice"):  # the distribution's name, then its old one
        try:
            return version(dist)
        except PackageNotFoundError:
            continue
    return "0+unknown"  # not installed (running from a checkout)


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)  # usage errors exit 2 here
    try:
        return int(args.func(args) or 0)
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())
