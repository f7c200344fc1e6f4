"""``sluice`` command line: serve, demo, plan, sources."""

from __future__ import annotations

import argparse
import json
import os
import sys

EXIT_OK, EXIT_USAGE, EXIT_CONFIG, EXIT_PLAN, EXIT_SOURCE = 0, 2, 3, 4, 5


def _cmd_serve(args: argparse.Namespace) -> int:
    import uvicorn

    if args.config:
        os.environ["SLUICE_CONFIG"] = args.config
    uvicorn.run("app.main:app", host=args.host, port=args.port, workers=1,
                log_level=args.log_level)
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


def _cmd_plan(args: argparse.Namespace) -> int:
    from pydantic import ValidationError

    from app.catalog import Catalog
    from app.engines import EngineError
    from app.problems import loc_to_pointer
    from app.service import ChartService
    from planner.errors import PlanError
    from planner.model import ChartRequest

    text = sys.stdin.read() if args.file == "-" else open(args.file, encoding="utf-8").read()
    try:
        body = json.loads(text)
    except json.JSONDecodeError as e:
        print(f"sluice plan: not valid JSON: {e}", file=sys.stderr)
        return EXIT_PLAN
    if args.source:
        body["source"] = args.source
    try:
        req = ChartRequest.model_validate(body)
    except ValidationError as e:
        for err in e.errors():
            print(f"sluice plan: {loc_to_pointer(tuple(err['loc']))}: {err['msg']}", file=sys.stderr)
        return EXIT_PLAN
    catalog = Catalog(_load(args))
    try:
        out = ChartService(catalog).plan_sql(req, args.dialect)
    except PlanError as e:
        print(f"sluice plan: {e.pointer or '/'}: {e.detail}", file=sys.stderr)
        return EXIT_PLAN
    except EngineError as e:
        print(f"sluice plan: source {e.source}: {e.message}", file=sys.stderr)
        return EXIT_SOURCE
    finally:
        catalog.close()
    for stmt in out["sql"]:
        print(stmt.rstrip(";") + ";")
    return EXIT_OK


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
    p = argparse.ArgumentParser(
        prog="sluice",
        description="Plan chart requests into grouped SQL and run them where the data lives.",
        epilog="Exit codes: 0 ok, 2 usage, 3 config error, 4 request cannot be planned, "
               "5 source unavailable.")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    s = sub.add_parser("serve", help="serve the HTTP API")
    s.add_argument("--host", default="127.0.0.1")
    s.add_argument("--port", type=int, default=int(os.environ.get("PORT", "8000")))
    s.add_argument("--config", help="TOML config (default: $SLUICE_CONFIG or the demo source)")
    s.add_argument("--log-level", default="info")
    s.set_defaults(func=_cmd_serve)

    d = sub.add_parser("demo", help="build the demo DuckDB file (fictional parcel deliveries)")
    d.add_argument("--rows", type=int, default=2_000_000, help="rows to generate (default 2,000,000)")
    d.add_argument("--out", default="data/demo.duckdb", help="output file (default data/demo.duckdb)")
    d.add_argument("--quiet", action="store_true", help="no progress bar")
    d.set_defaults(func=_cmd_demo)

    pl = sub.add_parser("plan", help="print the SQL for a chart request file ('-' = stdin)")
    pl.add_argument("file", help="chart request JSON file, or - for stdin")
    pl.add_argument("--source", help="override the request's source")
    pl.add_argument("--dialect", help="target dialect (default: the source's engine)")
    pl.add_argument("--config", help="TOML config (default: $SLUICE_CONFIG or the demo source)")
    pl.set_defaults(func=_cmd_plan)

    so = sub.add_parser("sources", help="list configured sources with row counts")
    so.add_argument("--config", help="TOML config (default: $SLUICE_CONFIG or the demo source)")
    so.set_defaults(func=_cmd_sources)
    return p


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    return int(args.func(args) or 0)


if __name__ == "__main__":
    sys.exit(main())
