"""The ``premises`` command: parse arguments, call the library, print, exit.

Exit codes: 0 done; 1 internal error (a bug: please report it); 2 bad input
(the message says file, line, block, key and the fix) or bad usage; 3 a block
is stale (``premises status``).
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import Callable, Sequence

from premises._version import PROTOCOL_VERSION, __version__

__all__ = ["main"]

EXIT_OK = 0
EXIT_INTERNAL = 1
EXIT_INPUT = 2
EXIT_STALE = 3


def _add_render(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser("render", help="write a copy of the document with each premises block replaced by its section")
    p.add_argument("document", type=Path)
    p.add_argument("-o", "--output", type=Path, help="output Markdown (default: <stem>.premises.md beside the document)")
    p.add_argument("--json", dest="json_path", type=Path, help="also write the results as JSON to this file")
    p.add_argument("--flavor", choices=("quarto", "pandoc", "gfm"), default="quarto", help="Markdown dialect (default quarto)")
    p.add_argument("--to", choices=("md", "html"), default="md", help="html also writes <output>.html with pandoc")
    p.add_argument("--detail", choices=("brief", "full"), help="override every block's detail")
    _add_common(p)
    p.set_defaults(run=_run_render)


def _add_common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--allow-outside-data", action="store_true", help="allow data paths outside the project folder")
    p.add_argument("--max-data-bytes", type=int, default=2 * 1024**3, help="largest data file read (default 2 GiB)")
    p.add_argument("--templates", type=Path, action="append", default=[], help="folder of templates overriding the shipped ones")
    p.add_argument("--debug", action="store_true", help="show the traceback of an internal error")


def _add_check(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser("check", help="validate blocks, rules, formulas and data columns without fitting")
    p.add_argument("documents", type=Path, nargs="+")
    _add_common(p)
    p.set_defaults(run=_run_check)


def _options(args: argparse.Namespace, **extra: object):  # type: ignore[no-untyped-def]
    from premises.pipeline import RenderOptions

    return RenderOptions(
        allow_outside_data=args.allow_outside_data,
        max_data_bytes=args.max_data_bytes,
        template_dirs=tuple(p.resolve() for p in args.templates),
        **extra,  # type: ignore[arg-type]
    )


def _run_render(args: argparse.Namespace) -> int:
    from premises.pipeline import default_output, render_file, write_html

    options = _options(args, flavor=args.flavor if args.to == "md" else "pandoc", detail=args.detail)
    output = args.output or default_output(args.document)
    done = render_file(args.document, output, options, json_path=args.json_path)
    print(f"wrote {output}")
    if args.to == "html":
        html = write_html(output, output.with_suffix(".html"), title=args.document.stem)
        print(f"wrote {html}")
    return EXIT_OK


def _run_check(args: argparse.Namespace) -> int:
    from premises.pipeline import check_file

    options = _options(args)
    for document in args.documents:
        specs = check_file(document, options)
        print(f"{document}: {len(specs)} block{'s' if len(specs) != 1 else ''} ok")
    return EXIT_OK


COMMANDS: tuple[Callable[[argparse._SubParsersAction], None], ...] = (_add_render, _add_check)  # type: ignore[type-arg]


def build_parser() -> argparse.ArgumentParser:
    """The argument parser (no heavy imports)."""
    parser = argparse.ArgumentParser(
        prog="premises",
        description="Generate a reproducible methods-and-diagnostics section for a linear regression "
        "from a premises block in a Markdown, Quarto or notebook document.",
        epilog="Exit codes: 0 done, 1 internal error, 2 bad input or usage, 3 stale (status).",
    )
    parser.add_argument("--version", action="version", version=f"premises {__version__} (protocol {PROTOCOL_VERSION})")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for add in COMMANDS:
        add(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Run the command line; return the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "run", None):
        parser.print_help()
        return EXIT_INPUT
    from premises.errors import PremisesError

    try:
        return int(args.run(args))
    except PremisesError as exc:
        print(f"premises: {exc.message}", file=sys.stderr)
        return exc.exit_code
    except KeyboardInterrupt:
        print("premises: interrupted; earlier outputs were left as they were.", file=sys.stderr)
        return 130
    except Exception as exc:  # noqa: BLE001 - the one place a bug becomes a message
        if getattr(args, "debug", False):
            raise
        print(
            f"premises: internal error ({type(exc).__name__}: {exc}). This is a bug in premises; "
            "run again with --debug for the traceback and report it.",
            file=sys.stderr,
        )
        return EXIT_INTERNAL


def entry() -> None:
    """Console-script entry point."""
    sys.exit(main())
