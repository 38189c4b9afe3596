"""The ``scalewright`` command: parse arguments, call the API, print, exit.

Exit codes: 0 the command ran (whatever the fit); 2 something the user must
fix (one paragraph on stderr, no traceback); 1 a bug in scalewright (the
traceback is printed so it can be reported).
"""

from __future__ import annotations

import argparse
import sys
import textwrap
import traceback
import warnings
from pathlib import Path

from scalewright import __version__, progress
from scalewright.errors import ScalewrightWarning, StudyError

DEFAULT_OUT = Path("reports")


def _parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="scalewright",
        description="Check that a questionnaire's hypothesised structure holds.")
    parser.add_argument("--version", action="version", version=f"scalewright {__version__}")
    commands = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    check = commands.add_parser(
        "check", help="fit every model in a model file and write the report",
        description="Fit every rival model in MODEL_FILE, write DIR/<name>.json and "
                    "DIR/<name>.html.")
    check.add_argument("model_file", metavar="MODEL_FILE")
    check.add_argument("--out", metavar="DIR", type=Path, default=DEFAULT_OUT,
                       help=f"folder for the report (default: ./{DEFAULT_OUT})")
    check.add_argument("--pdf", action="store_true",
                       help="also print the report to DIR/<name>.pdf (needs Chromium)")
    check.add_argument("--tables", metavar="TABLES_DIR", type=Path, default=None,
                       help="also write every table of the report as CSV and Markdown into "
                            "TABLES_DIR")
    check.add_argument("--fit-only", action="store_true",
                       help="fit and compare the models only: no local fit, item review, "
                            "reliability or invariance (a quick first look)")

    init = commands.add_parser(
        "init", help="draft a model file from a data file's columns",
        description="Write a first model file for DATA_FILE, to edit before checking.")
    init.add_argument("data_file", metavar="DATA_FILE")
    init.add_argument("--to", metavar="PATH", type=Path, default=None,
                      help="where to write the draft (default: beside the data, <data>.yaml)")

    demo = commands.add_parser(
        "demo", help="write the invented demo study into a folder and check it",
        description="Write the teacher workplace climate demo (data and model file) into DIR "
                    "and check it; the report goes to DIR/report.")
    demo.add_argument("folder", metavar="DIR", nargs="?", type=Path,
                      default=Path("scalewright-demo"))
    return parser


def _run(args) -> int:
    from scalewright import api
    if args.command == "check":
        if args.tables is not None:       # refused before the models are fitted
            from scalewright.report.tables import check_tables_folder
            check_tables_folder(args.tables)
        result = api.check(args.model_file, out=args.out, fit_only=args.fit_only)
        _summarise(result, args.out)
        _extras(result, args)
        _refuse_non_convergence(result, args.out)
    elif args.command == "init":
        from scalewright.draft import draft_model_file
        path = draft_model_file(args.data_file, args.to)
        print(f"Drafted {path}. Edit the constructs, then run: scalewright check {path}")
    elif args.command == "demo":
        from scalewright.demo import write_demo
        model_file = write_demo(args.folder)
        out = args.folder / "report"
        result = api.check(model_file, out=out)
        _summarise(result, out)
    return 0


def _extras(result, args) -> None:
    """The optional outputs of ``check``: tables (--tables) and PDF (--pdf)."""
    if args.tables is not None:
        from scalewright.report.document import export_tables
        written = export_tables(result.to_dict(), args.tables)
        print(f"Tables: {len(written) // 2} tables as CSV and Markdown in {args.tables}")
    if args.pdf:
        from scalewright.report.pdf import print_pdf
        stem = result.study.path.stem
        print(f"PDF: {print_pdf(args.out / (stem + '.html'), args.out / (stem + '.pdf'))}")


def _refuse_non_convergence(result, out: Path) -> None:
    """A rival model whose estimation did not converge is something to fix:
    exit 2 with a message at its line in the model file, after the report
    (which shows every model and says which numbers to ignore) was written."""
    from scalewright.diagnostics import NON_CONVERGENCE_ADVICE
    stuck = [m for m in result.models if not m.converged]
    if not stuck:
        return
    study = result.study
    places = "; ".join(f"{study.place_of('models', m.name)}: the estimation of model "
                       f"'{m.name}' did not converge ({m.estimate.record.message})"
                       for m in stuck)
    written = f" The report in {out} shows every model and marks these." if out else ""
    raise StudyError(
        f"{places}, so {'its' if len(stuck) == 1 else 'their'} numbers are not estimates. "
        f"{NON_CONVERGENCE_ADVICE}{written}")


def _summarise(result, out: Path) -> None:
    progress.clear()
    stem = result.study.path.stem
    print(f"{result.study.title}: {result.n_used} of {result.data.n_rows} rows used.")
    for m in result.models:
        f = m.fit
        state = "" if m.converged else "  (did not converge)"
        print(f"  {m.name:<24} chi2 = {f.chi_square:.2f} on {f.df} df, CFI = {f.cfi:.3f}, "
              f"RMSEA = {f.rmsea:.3f}, SRMR = {f.srmr:.3f}{state}")
    if result.fit_only:
        print("Fit only: local fit, item review, reliability and invariance were not examined.")
    print(f"Report: {out / (stem + '.html')}   Data: {out / (stem + '.json')}")


def main(argv: list[str] | None = None) -> int:
    args = _parser().parse_args(argv)
    # a person watching a terminal: a status line says what the long stages are doing
    status = progress.show_on(sys.stderr) if sys.stderr.isatty() else None
    try:
        return _main(args)
    finally:
        if status is not None:
            progress.stop(status)


def _main(args) -> int:
    """Run the command; a problem to fix exits 2 with its message, a bug 1."""
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ScalewrightWarning)  # they are in the report
            return _run(args)
    except StudyError as exc:
        progress.clear()
        print(textwrap.fill(str(exc), width=100), file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        progress.clear()
        return 130
    except Exception:  # noqa: BLE001 - anything else is a bug, said plainly
        progress.clear()
        traceback.print_exc()
        print("\nThis is a bug in scalewright, not a problem with your files. Please report "
              "it with the message above.", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())
