"""The ``premises`` command: parse arguments, call the library, print, exit.

Exit codes: 0 done; 1 internal error (a bug: please report it); 2 bad input
(the message says file, line, block, key and the fix) or bad usage; 3 a block
is stale (``premises status``).
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Sequence
from pathlib import Path

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
    p.add_argument("--jobs", type=_jobs, default=1, help="blocks computed in parallel worker processes (default 1; 0: one per CPU); the output is the same")
    _add_common(p)
    p.set_defaults(run=_run_render)


def _jobs(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number of worker processes, got {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"the number of jobs must be 0 (one per CPU) or more, got {text!r}")
    return value


def _add_common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--allow-outside-data", action="store_true", help="allow data paths outside the project folder")
    p.add_argument("--max-data-bytes", type=int, default=2 * 1024**3, help="largest data file read (default 2 GiB)")
    p.add_argument("--templates", type=Path, action="append", default=[], help="folder of templates overriding the shipped ones")
    p.add_argument("--debug", action="store_true", help="show the traceback of an internal error")
    p.add_argument("--no-cache", action="store_true", help="neither read nor write the result store (same output, no change log)")
    p.add_argument("--cache-dir", type=Path, help="result store folder (default: .premises/ in the project root)")
    p.add_argument("--tolerance", type=_tolerance, default=0.5, help="change log: list coefficients that moved by more than this many SEs (default 0.5)")


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
        use_cache=not getattr(args, "no_cache", False),
        cache_dir=args.cache_dir.resolve() if getattr(args, "cache_dir", None) else None,
        change_tolerance=getattr(args, "tolerance", 0.5),
        **extra,  # type: ignore[arg-type]
    )


def _tolerance(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number of standard errors, got {text!r}") from None
    if not value >= 0:
        raise argparse.ArgumentTypeError(f"the tolerance must be zero or more, got {text!r}")
    return value


def _run_render(args: argparse.Namespace) -> int:
    from premises.pipeline import default_output, render_file, write_html

    options = _options(args, flavor=args.flavor if args.to == "md" else "pandoc", detail=args.detail, jobs=args.jobs)
    output = args.output or default_output(args.document)
    render_file(args.document, output, options, json_path=args.json_path)
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


def _add_filter(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser("filter", help="answer a request of the Lua filter (request Markdown on stdin, reply on stdout)")
    p.add_argument("--protocol", type=int, required=True, help="protocol the filter speaks; must match the package")
    p.add_argument("--flavor", choices=("quarto", "pandoc", "gfm"), default="pandoc", help="Markdown dialect of the sections")
    p.add_argument("--base-dir", type=Path, default=Path("."), help="the document's folder (data paths and figures)")
    p.add_argument("--input", dest="input_name", default="-", help="the document's path as pandoc named it (- for stdin)")
    p.add_argument("--on-error", choices=("fail", "warn"), default="fail", help="warn: a failed block becomes a warning callout")
    _add_common(p)
    p.set_defaults(run=_run_filter)


def _run_filter(args: argparse.Namespace) -> int:
    from premises.errors import PremisesError
    from premises.quarto import run_filter

    request = sys.stdin.buffer.read().decode("utf-8")
    try:
        reply = run_filter(
            request,
            protocol=args.protocol,
            flavor=args.flavor,
            base_dir=args.base_dir,
            input_name=args.input_name,
            on_error=args.on_error,
            options=_options(args),
        )
    except PremisesError as exc:
        # The filter shows stdout in its error; pandoc would print stderr a second time.
        sys.stdout.buffer.write(f"premises: {exc.message}\n".encode())
        return exc.exit_code
    sys.stdout.buffer.write(reply.encode("utf-8"))
    return EXIT_OK


def _add_lua_filter(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser("lua-filter", help="print the path of the packaged premises.lua (for pandoc --lua-filter)")
    p.set_defaults(run=_run_lua_filter)


def _run_lua_filter(args: argparse.Namespace) -> int:
    from premises.quarto import lua_filter_path

    print(lua_filter_path())
    return EXIT_OK


def _add_quarto(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser("quarto", help="Quarto helpers: install the extension, pre-render check")
    inner = p.add_subparsers(dest="quarto_command", metavar="ACTION")
    install = inner.add_parser("install", help="copy the premises extension into DIR/_extensions/premises")
    install.add_argument("directory", type=Path, nargs="?", default=Path("."), help="project folder (default: .)")
    install.set_defaults(run=_run_quarto_install)
    pre = inner.add_parser("prerender", help="check every block of the files Quarto is about to render (project: pre-render:)")
    _add_common(pre)
    pre.set_defaults(run=_run_quarto_prerender)
    p.set_defaults(run=_run_quarto_missing)


def _run_quarto_missing(args: argparse.Namespace) -> int:
    print("premises quarto: choose an action: install [DIR] or prerender (see premises quarto --help).", file=sys.stderr)
    return EXIT_INPUT


def _run_quarto_install(args: argparse.Namespace) -> int:
    from premises.quarto import install_extension

    target = install_extension(args.directory)
    print(f"installed the premises {__version__} extension in {target}; enable it with filters: [premises]")
    return EXIT_OK


def _run_quarto_prerender(args: argparse.Namespace) -> int:
    import os
    from functools import partial

    from premises.quarto import prerender, project_inputs, quiet_from_env, warm_document

    paths = project_inputs(os.environ, Path("."))  # Quarto runs pre-render in the project folder
    echo = None if quiet_from_env() else print
    options = _options(args)
    # With the result cache on, rendering every block now makes each filter call a cache hit.
    warm = partial(warm_document, options=_options(args, flavor="quarto")) if options.use_cache else None
    report = prerender(paths, options, echo=echo, warm=warm)
    for error in report.errors:
        print(f"premises: {error.message}", file=sys.stderr)
    if report.errors:
        print(f"premises: {len(report.errors)} document(s) have a block that cannot render; nothing was rendered.", file=sys.stderr)
        return max(error.exit_code for error in report.errors)
    return EXIT_OK


def _add_notebook(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser("notebook", help="write a copy of a notebook with each block followed by its section")
    p.add_argument("notebook", type=Path)
    p.add_argument("-o", "--output", type=Path, help="output notebook (default: <stem>.premises.ipynb beside it)")
    p.add_argument("--flavor", choices=("gfm", "quarto"), default="gfm", help="gfm reads well in Jupyter; quarto for rendering with Quarto")
    p.add_argument("--detail", choices=("brief", "full"), help="override every block's detail")
    _add_common(p)
    p.set_defaults(run=_run_notebook)


def _run_notebook(args: argparse.Namespace) -> int:
    from premises.notebooks import render_notebook

    done = render_notebook(args.notebook, args.output, _options(args, flavor=args.flavor, detail=args.detail))
    print(f"wrote {done.output} ({len(done.results)} block{'s' if len(done.results) != 1 else ''}, {done.cells_written} cells)")
    return EXIT_OK


def _add_status(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser("status", help="say whether each block's rendered section is current, stale (and why) or never rendered; exit 3 if any is not current")
    p.add_argument("documents", type=Path, nargs="+")
    p.add_argument("--flavor", choices=("quarto", "pandoc", "gfm"), help="flavor to check against (default: that of the last render)")
    p.add_argument("--detail", choices=("brief", "full"), help="detail to check against (default: that of the last render)")
    _add_common(p)
    p.set_defaults(run=_run_status)


def _run_status(args: argparse.Namespace) -> int:
    from premises.staleness import block_status

    options = _options(args, detail=args.detail)
    code = EXIT_OK
    for document in args.documents:
        for status in block_status(document, options, flavor=args.flavor):
            why = f" ({'; '.join(status.reasons)})" if status.reasons else ""
            print(f"{document}: {status.block}: {status.state}{why}")
            if status.state != "current":
                code = EXIT_STALE
    return code


def _add_diff(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser("diff", help="print each block's change log: what changed at its last render, against the one before")
    p.add_argument("document", type=Path)
    p.add_argument("--block", help="only this block id")
    p.add_argument("--json", dest="as_json", action="store_true", help="print the change logs as JSON")
    _add_common(p)
    p.set_defaults(run=_run_diff)


def _run_diff(args: argparse.Namespace) -> int:
    import json

    from premises.changes import format_change_log
    from premises.staleness import block_status, recorded_changes

    options = _options(args)
    found = recorded_changes(args.document, options, args.block)
    if args.as_json:
        print(json.dumps({block: dict(last.change_log) if last else None for block, last in found}, indent=2, ensure_ascii=False))
        return EXIT_OK
    stale = {s.block for s in block_status(args.document, options) if s.state == "stale"}
    for block, last in found:
        if last is None:
            print(f"{block}: never rendered with the result store")
            continue
        head = f"{block}: " + ("changes at the last render" if last.change_log else "no changes recorded (first render, or nothing changed since)")
        print(head + (" -- its inputs changed since; render again to update" if block in stale else ""))
        for line in format_change_log(last.change_log):
            print(f"  {line}")
    return EXIT_OK


def _add_ledger(sub: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser("ledger", help="export excluded and missing rows (--csv) or per-observation diagnostics (--diagnostics)")
    p.add_argument("document", type=Path)
    p.add_argument("--block", help="only this block id")
    p.add_argument("--csv", dest="csv_path", type=Path, help="write every excluded or missing row with its rule, reason and diagnostics")
    p.add_argument("--diagnostics", type=Path, help="write fitted, residual, leverage, studentized, Cook's D, DFFITS, DFBETAS of every analysed row (.csv or .parquet)")
    _add_common(p)
    p.set_defaults(run=_run_ledger)


def _run_ledger(args: argparse.Namespace) -> int:
    from premises.exports import diagnostics_rows, ledger_rows, write_table

    if args.csv_path is None and args.diagnostics is None:
        print("premises ledger: give --csv OUT and/or --diagnostics OUT.", file=sys.stderr)
        return EXIT_INPUT
    options = _options(args)
    if args.csv_path is not None:
        columns, rows = ledger_rows(args.document, options, args.block)
        write_table(columns, rows, args.csv_path)
        print(f"wrote {args.csv_path} ({len(rows)} row{'s' if len(rows) != 1 else ''} excluded or missing)")
    if args.diagnostics is not None:
        columns, rows = diagnostics_rows(args.document, options, args.block)
        write_table(columns, rows, args.diagnostics)
        print(f"wrote {args.diagnostics} ({len(rows)} analysed row{'s' if len(rows) != 1 else ''})")
    return EXIT_OK


COMMANDS: tuple[Callable[[argparse._SubParsersAction], None], ...] = (  # type: ignore[type-arg]
    _add_render, _add_check, _add_filter, _add_lua_filter, _add_quarto, _add_notebook,
    _add_status, _add_diff, _add_ledger,
)


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
    except Exception as exc:
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
