"""The `sced-audit` command line.

Exit codes: 0 everything usable; 1 results written or checked, but some input was quarantined;
2 bad invocation or nothing usable (one-line reason, no traceback unless --verbose).
"""

from __future__ import annotations

import argparse
import json
import sys
import traceback
from pathlib import Path

import pandas as pd

from audit import __version__
from audit.config import AuditConfig, ConfigError, load_config
from audit.ingest import InputError

EXIT_OK = 0
EXIT_QUARANTINE = 1
EXIT_UNUSABLE = 2

CAUTION = (
    "Caution: these diagnostics support, and never replace, visual analysis and professional judgment. "
    "Follow your review protocol and local professional standards."
)


class UsageError(Exception):
    """Bad invocation or unusable input: reported in one line, exit code 2."""


def _config(args) -> AuditConfig:
    try:
        config = load_config(getattr(args, "config", None))
        return config.with_alpha(getattr(args, "alpha", None))
    except ConfigError as exc:
        raise UsageError(str(exc)) from None


# ------------------------------------------------------------------ validate

def _validation_document(review) -> dict:
    prep = review.prepared
    quarantined_cases = prep.cases_quarantined
    return {
        "rows_read": prep.rows_read,
        "rows_accepted": prep.rows_accepted,
        "rows_quarantined": prep.rows_quarantined,
        "cases_accepted": int(len(prep.cases)),
        "cases_quarantined": int(len(quarantined_cases)),
        "cases_below_five_point_standard": int(prep.cases["below_five_point_standard"].sum()) if len(prep.cases) else 0,
        "files": review.per_file().to_dict(orient="records"),
        "path_problems": [p.message for p in review.path_problems],
        "quarantined_cases": quarantined_cases.to_dict(orient="records"),
        "quarantine": _records(prep.quarantine),
        "adjustments": _records(prep.adjustments),
    }


def _records(df: pd.DataFrame) -> list[dict]:
    return json.loads(df.to_json(orient="records"))


def print_validation(review, out=None, limit: int = 30) -> None:
    """Human-readable validation report: per-file counts, problems, repairs."""
    out = out or sys.stdout
    prep = review.prepared
    per_file = review.per_file()
    print("Input files", file=out)
    print(_table(per_file), file=out)
    for problem in review.path_problems:
        print(f"! {problem.message}", file=out)
    q = prep.quarantine
    if len(q):
        print(f"\nProblems ({len(q)}; quarantined rows are left out, the other cases go on)", file=out)
        for msg in q["message"].head(limit):
            print(f"  - {msg}", file=out)
        if len(q) > limit:
            print(f"  ... and {len(q) - limit} more (use --json for all)", file=out)
    adj = prep.adjustments
    if len(adj):
        counts = adj["rule"].value_counts()
        summary = ", ".join(f"{rule.replace('_', ' ')}: {n}" for rule, n in counts.items())
        print(f"\nRepairs made ({len(adj)}): {summary}", file=out)
    below = int(prep.cases["below_five_point_standard"].sum()) if len(prep.cases) else 0
    print(
        f"\nRows: {prep.rows_read} read = {prep.rows_accepted} accepted + {prep.rows_quarantined} quarantined. "
        f"Cases: {len(prep.cases)} accepted ({below} with a phase below the usual 5-point standard), "
        f"{len(prep.cases_quarantined)} quarantined.",
        file=out,
    )


def _table(df: pd.DataFrame) -> str:
    if df.empty:
        return "  (none)"
    return df.to_string(index=False)


def cmd_validate(args) -> int:
    from audit.intake import load_review

    config = _config(args)
    try:
        review = load_review(args.paths, config)
    except InputError as exc:
        raise UsageError(str(exc)) from None
    if args.json:
        json.dump(_validation_document(review), sys.stdout, indent=2, default=str)
        print()
    else:
        print_validation(review)
    prep = review.prepared
    if prep.rows_accepted == 0:
        if not args.json:
            print("Nothing usable: no case passed validation.", file=sys.stderr)
        return EXIT_UNUSABLE
    return EXIT_QUARANTINE if (prep.rows_quarantined or len(prep.quarantine) or review.path_problems) else EXIT_OK


# ------------------------------------------------------------------ demo

def cmd_demo(args) -> int:
    from audit.demo import write_demo_review
    from audit.intake import load_review

    folder = Path(args.dir)
    demo = write_demo_review(folder)
    print(f"Wrote an invented demo review to {demo.data_folder} ({len(demo.files)} files). All studies are fictional.")
    review = load_review([demo.data_folder], AuditConfig())
    print_validation(review, limit=10)
    print(f"\n{CAUTION}")
    return EXIT_OK


# ------------------------------------------------------------------ entry point

def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="sced-audit",
        description="Batch audit of serial dependence and trend in digitized single-case series.",
    )
    parser.add_argument("--version", action="version", version=f"sced-audit {__version__}")
    parser.add_argument("--verbose", action="store_true", help="full logs and tracebacks")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("validate", help="check input files without writing results")
    p.add_argument("paths", nargs="+", metavar="PATH", help="files or folders (searched recursively)")
    p.add_argument("--config", metavar="FILE", help="TOML file with column and phase-label maps")
    p.add_argument("--json", action="store_true", help="print a JSON document instead of tables")
    p.set_defaults(func=cmd_validate)

    p = sub.add_parser("demo", help="write an invented demo review and audit it")
    p.add_argument("--dir", default="sced-audit-demo", metavar="DIR", help="folder for the demo (default: %(default)s)")
    p.set_defaults(func=cmd_demo)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return EXIT_UNUSABLE
    try:
        return int(args.func(args))
    except UsageError as exc:
        print(f"sced-audit: error: {exc}", file=sys.stderr)
        return EXIT_UNUSABLE
    except KeyboardInterrupt:
        print("sced-audit: interrupted", file=sys.stderr)
        return 130
    except Exception as exc:  # a bug: short message, traceback on request
        if args.verbose:
            traceback.print_exc()
        else:
            print(f"sced-audit: internal error: {type(exc).__name__}: {exc} (rerun with --verbose for details)",
                  file=sys.stderr)
        return 3


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
