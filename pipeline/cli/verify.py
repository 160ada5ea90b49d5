"""`formgate verify`: is a certificate, result or verification code what the station published;
does the whole ledger still hold together.

Argument parsing and printing only; the checks are pipeline.audit.verify's. Reads the
station folder's station.toml and ledger, and is safe beside a running station.
"""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

from pipeline.cli.exits import EXIT_OK, EXIT_REJECTED, EXIT_USER
from pipeline.errors import FormgateError

if TYPE_CHECKING:
    from pipeline.audit.verify import Verification

MARKS = {True: "ok", False: "!!", None: ""}

LAST_ROWS = (
    "The chains show a row changed, inserted or removed before the last one. Removing the last\n"
    "rows, or rewriting every hash after an edit, cannot be seen from inside the ledger: keep the\n"
    "last hashes above elsewhere (a mail, a printout, the plant database) and compare them."
)


def show(found: Verification) -> None:
    """One heading line, then one line per finding: ok, !! (does not verify), or a fact."""
    print(f"{found.subject}: {'verified' if found.verified else 'NOT VERIFIED'}")
    for f in found.findings:
        print(f"  {MARKS[f.ok]:<2}  {f.text}")


def cmd_verify(args: argparse.Namespace) -> int:
    """Verify files, verification codes and, with --ledger, the whole ledger."""
    from pipeline.audit.verify import Verifier
    from pipeline.ledger.ledger import Ledger
    from pipeline.report.verification import parse_code
    from pipeline.station.settings import read_settings

    if not args.items and not args.ledger:
        raise FormgateError(
            "nothing to verify",
            None,
            "Give certificates, result files or verification codes after the station "
            "folder, or --ledger to check the whole ledger.",
        )
    settings = read_settings(Path(args.station))
    if not settings.ledger.exists():
        raise FormgateError(
            f"{settings.ledger}: the station has no ledger",
            None,
            "Give the folder of the station that published the files (it holds station.toml "
            "and ledger.sqlite).",
        )
    worst = EXIT_OK
    with Ledger(settings.ledger) as ledger:
        verifier = Verifier(settings, ledger)
        for item in args.items:
            path = Path(item)
            code = None if path.exists() else parse_code(item)
            if code is not None:
                found = verifier.code(code)
            else:
                try:
                    data = path.read_bytes()
                except OSError as exc:
                    hint = (
                        "Give a certificate or result file, or a verification code (16 hex "
                        "digits)." if not path.exists() else "Check the path and its permissions."
                    )
                    print(f"{item}: {exc.strerror or exc}.\n  {hint}", file=sys.stderr)
                    worst = EXIT_USER
                    continue
                found = verifier.file(path, data)
            show(found)
            if not found.verified:
                worst = max(worst, EXIT_REJECTED)
        if args.ledger:
            found = verifier.whole_ledger()
            show(found)
            print(LAST_ROWS)
            if not found.verified:
                worst = max(worst, EXIT_REJECTED)
    return worst


def add_commands(sub: Any) -> None:
    """Add `verify` to the command line's sub-commands."""
    verify = sub.add_parser(
        "verify",
        help="tell published certificates and results from changed ones; check the ledger",
        description="Check certificates, result files or verification codes against what the "
        "station recorded when it published them: the file's bytes, the input it was judged "
        "from, the rule-set text, the files published with it. With --ledger, check the whole "
        "ledger: its hash chains, every published file, every archived input.",
        epilog="example: formgate verify station/ station/certificates/LOT-7/C-0042.pdf\n"
        "         formgate verify station/ 1a2b3c4d5e6f7a8b\n"
        "         formgate verify station/ --ledger",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    verify.add_argument("station", metavar="STATION", help="the station folder")
    verify.add_argument(
        "items",
        nargs="*",
        metavar="FILE_OR_CODE",
        help="certificate PDFs, result JSONs, lot reports, or verification codes",
    )
    verify.add_argument(
        "--ledger",
        action="store_true",
        help="check the whole ledger: hash chains, published files, archived inputs, rule texts",
    )
    verify.set_defaults(func=cmd_verify)
