"""The ``skydrift`` command: serve the API, write the OpenAPI document, the commands on
catalogue files (see :mod:`service.commands`) and whole-catalogue batch runs on Dask
(see :mod:`service.batch`)."""

from __future__ import annotations

import argparse
import os
import pathlib
import sys

DEFAULT_BIND = "127.0.0.1:8000"


def _serve(args) -> int:
    here = pathlib.Path(__file__).resolve().parents[1]
    conf = here / "deploy" / "gunicorn.conf.py"
    # gunicorn of this interpreter's environment, not the first one on PATH: the command is
    # often run as .venv/bin/skydrift without the environment activated.
    argv = [sys.executable, "-m", "gunicorn", "service.wsgi:app"]
    if conf.is_file():
        argv[3:3] = ["--config", str(conf)]
    if args.bind:
        argv[3:3] = ["--bind", args.bind]
    os.execv(argv[0], argv)  # replaces this process; gunicorn handles signals
    return 0  # pragma: no cover


def _openapi(args) -> int:
    import orjson

    from .api import create_app
    from .api.docs import openapi_document
    from .config import Settings

    app = create_app({"SKYDRIFT_SETTINGS": Settings()})
    doc = openapi_document(app)
    text = orjson.dumps(doc, option=orjson.OPT_INDENT_2 | orjson.OPT_SORT_KEYS).decode() + "\n"
    if args.output in (None, "-"):
        sys.stdout.write(text)
    else:
        try:
            pathlib.Path(args.output).write_text(text)
        except OSError as exc:  # a failure, not a bad command line: 1, in one line
            print(f"skydrift: {args.output}: {exc.strerror or exc}", file=sys.stderr)
            return 1
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="skydrift",
        description="Skydrift: stellar epoch transformation service and tools.",
    )
    sub = parser.add_subparsers(dest="command", required=True)
    serve = sub.add_parser("serve", help="run the HTTP service under gunicorn")
    serve.add_argument(
        "--bind",
        default=os.environ.get("SKYDRIFT_BIND"),
        help=f"address:port to listen on (default {DEFAULT_BIND}, or SKYDRIFT_BIND)",
    )
    serve.set_defaults(func=_serve)
    openapi = sub.add_parser("openapi", help="write the OpenAPI 3.1 document")
    openapi.add_argument("--output", "-o", help="file to write (default: standard output)")
    openapi.set_defaults(func=_openapi)
    from .commands import add_commands

    add_commands(sub)
    from .batch.cli import add_subcommands as add_batch_subcommands  # dask imported only on use

    add_batch_subcommands(sub)
    return parser


def main(argv=None) -> int:
    args = build_parser().parse_args(argv)
    return args.func(args)


if __name__ == "__main__":
    sys.exit(main())
