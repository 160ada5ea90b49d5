"""The one mail a regrade sends, when asked: a summary to the digest recipients, its report attached.

Never one mail per cell: the report lists the cells. A regrade that turns a cell into a
fail says so with the safety caution every failure letter carries.
"""

from __future__ import annotations

from collections.abc import Sequence

from pipeline.mail.letters import Letter, _domain, message_id_for
from pipeline.report import hazards


def regrade_letter(
    *,
    regrade_id: int,
    station: str,
    run_by: str,
    reason: str,
    rule_sets: Sequence[tuple[str, str, str]],
    counts: Sequence[tuple[str, int]],
    new_fails: int,
    family: str | None,
    recipients: Sequence[str],
    report_path: str,
    domain: str | None,
) -> Letter:
    """The summary of regrade ``regrade_id`` as applied (its Message-ID is the regrade's own)."""
    changed = sum(n for _, n in counts)
    lines = [
        f"Regrade {regrade_id} on station {station}, run by {run_by}: {reason}",
        "",
        "Rule sets: " + "; ".join(f"{n} revision {r} (SHA-256 {s[:12]}...)" for n, r, s in rule_sets),
        "",
        f"{changed} cell{'s' if changed != 1 else ''} changed:" if changed else "No cell changed.",
        *(f"  {change}: {n}" for change, n in counts),
        "",
        "The attached report lists every cell with the checks behind its change; each changed "
        "cell has a new decision and certificate beside its old ones.",
    ]
    if new_fails:
        lines += [
            "",
            f"CAUTION: {new_fails} cell{'s' if new_fails != 1 else ''} now fail"
            f"{'s' if new_fails == 1 else ''} and may be hazardous. {hazards.HANDLING}",
            hazards.general_caution(family),
        ]
    return Letter(
        "digest",
        message_id_for("digest", f"regrade:{station}:{regrade_id}", domain=_domain(station, domain)),
        tuple(recipients),
        f"[formgate] regrade {regrade_id}: {changed} cell{'s' if changed != 1 else ''} changed",
        "\n".join(lines) + "\n",
        report_path,
        None,
    )
