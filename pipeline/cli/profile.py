"""`formgate profile guess` and `formgate profile show`: a profile for a file, and what a profile reads.

Argument parsing and printing only. Guessing is pipeline.read.guess's (a pure function of
the file's bytes and name); reading is the readers' (the same RawTable and Trace a check
or a station makes), cutting steps the judge's segmentation with the rule set of the
file's cell type, as `formgate check` does.
"""

from __future__ import annotations

import argparse
import math
import sys
from collections.abc import Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from pipeline.cli.exits import EXIT_OK
from pipeline.errors import FormgateError

if TYPE_CHECKING:
    from pipeline.model import Segmentation, Trace
    from pipeline.read.profile import Profile
    from pipeline.read.table import RawTable

# Rows shown at each end of the record.
END_ROWS = 3


def cmd_profile_guess(args: argparse.Namespace) -> int:
    """Print (or write) a profile guessed from one file."""
    from pipeline.read.cyclefile import read_cycle_file
    from pipeline.read.guess import guess_profile
    from pipeline.read.profile import load_profile
    from pipeline.writing import write_atomic

    path = Path(args.file)
    data = path.read_bytes()
    text = guess_profile(data, str(path))
    if args.out:
        out = Path(args.out)
        write_atomic(text.encode("utf-8"), out)
        print(f"{out}: a profile for {path.name}; see what it reads with: "
              f"formgate profile show {out} {args.file}")
    else:
        print(text, end="")
    # say at once when the file cannot be read with the profile as it is (e.g. no cell type)
    try:
        read_cycle_file(data, str(path), load_profile(text, str(args.out or "(the printed profile)")))
    except FormgateError as exc:
        print(f"note: {path.name} cannot be read with this profile as it is:", file=sys.stderr)
        for line in str(exc).splitlines():
            print(f"  {line.strip()}", file=sys.stderr)
        print("  The profile's comments say what the file lacks.", file=sys.stderr)
    return EXIT_OK


def cmd_profile_show(args: argparse.Namespace) -> int:
    """Print what formgate reads from a file with a profile, and the steps it would cut."""
    from pipeline.read.profile import load_profile

    profile_path = Path(args.profile)
    profile = load_profile(profile_path.read_text(encoding="utf-8"), str(profile_path))
    path = Path(args.file)
    data = path.read_bytes()
    table, trace, lacking = _read(data, str(path), profile)
    for line in read_lines(profile, table, trace):
        print(line)
    if lacking is not None:
        # what was read is shown; the steps need the rule set the cell type chooses
        print()
        print("steps: not cut, the file lacks metadata a check needs (below)")
        raise lacking
    segmentation, rule_words, notes = _segment(trace, Path(args.rules))
    print()
    for line in step_lines(segmentation, rule_words):
        print(line)
    if notes:
        print()
        print("notes")
        for note in notes:
            print(f"  {note}")
    return EXIT_OK


MISSING = "(missing)"


def _read(
    data: bytes, name: str, profile: Profile
) -> tuple[RawTable, Trace, FormgateError | None]:
    """The file's table and trace, as a check reads them.

    A file that lacks a cell id, lot or cell type is read all the same, those shown as
    missing, and the error a check gives is returned to be raised once the rest is shown.
    """
    from dataclasses import replace

    from pipeline.errors import InputError
    from pipeline.read.convert import to_trace
    from pipeline.read.cyclefile import read_table
    from pipeline.read.profile_keys import REQUIRED_METADATA

    lacking: FormgateError | None = None
    try:
        table = read_table(data, name, profile)
    except InputError as exc:
        if not any(exc.problem.startswith(f"no {key} in the metadata") for key in REQUIRED_METADATA):
            raise
        lacking = exc
        standing = {key: MISSING for key in REQUIRED_METADATA}
        table = read_table(data, name, replace(profile, metadata={**standing, **profile.metadata}))
    return table, to_trace(table, profile), lacking


def _segment(trace: Trace, rules: Path) -> tuple[Segmentation, str, list[str]]:
    """The steps the judge would cut, with the rule set of the trace's cell type, and the notes."""
    from pipeline.judge.segmentation import split_steps
    from pipeline.read.validate import validated
    from pipeline.rulebook.book import load_rules_dir

    rulebook = load_rules_dir(rules)
    rule_set, cell_type = rulebook.for_cell_type(trace.cell_type, source=trace.source)
    valid, notes = validated(trace, cell_type)  # as the judge validates
    one_c_a = cell_type.nominal_capacity_ah
    segmentation = split_steps(valid, rule_set.rest_current_fraction * one_c_a, one_c_a)
    words = f"rule set {rule_set.name} for cell type {cell_type.name}, 1 C = {one_c_a:g} A"
    texts = [n.text for n in (*trace.notes, *notes, *segmentation.notes)]
    return segmentation, words, texts


# ---------------------------------------------------------------- what was read


def _number(value: float, digits: int) -> str:
    if math.isnan(value):
        return ""
    text = f"{value:.{digits}f}"
    return text[1:] if text.startswith("-") and not text.strip("-0.") else text  # no "-0.000"


def _table(rows: Sequence[Sequence[str]], left: int = 1) -> list[str]:
    """Rows of cells as aligned text: the first ``left`` columns to the left, the rest to the right."""
    widths = [max(len(row[i]) for row in rows) for i in range(len(rows[0]))]
    lines = []
    for row in rows:
        pairs = enumerate(zip(row, widths, strict=True))
        cells = [c.ljust(w) if i < left else c.rjust(w) for i, (c, w) in pairs]
        lines.append("  " + "  ".join(cells).rstrip())
    return lines


def _units(profile: Profile, quantity: str) -> str:
    """How a mapped column is read, in words."""
    from pipeline.read.profile_keys import ISO_8601

    if quantity == "time":
        if profile.time_stamps == "date-time":
            pattern = "ISO 8601" if profile.date_format == ISO_8601 else f'"{profile.date_format}"'
            zone = profile.zone or "a stamp's own offset"
            if profile.zone_metadata:
                zone = f"the metadata {profile.zone_metadata}, else {zone}"
            return f"date and time ({pattern}; zone: {zone}) -> s since the first stamp"
        since = "since the step began" if profile.time_stamps == "step elapsed" else "elapsed"
        return f"{profile.time_unit}, {since} -> s since the record began"
    if quantity == "voltage":
        return "V" if profile.voltage_unit == "V" else f"{profile.voltage_unit} -> V"
    if quantity == "current":
        sign = profile.current_sign
        if sign == "from mode":
            sign = "a magnitude, its sign from the mode"
        if (profile.current_unit, sign) == ("A", "charge positive"):
            return "A, charge positive"
        return f"{profile.current_unit}, {sign} -> A, positive = charge"
    if quantity == "temperature":
        return "°C"
    if quantity in ("step", "cycle"):
        return "whole numbers"
    if quantity == "mode":
        listed = ", ".join(f"{v!r} {k}" for v, k in profile.modes.items())
        return f"the current's direction: {listed}"
    if quantity in ("capacity", "energy"):
        unit = profile.capacity_unit if quantity == "capacity" else profile.energy_unit
        compared = "compared with formgate's integral" if profile.compare_counters else "not compared"
        return f"{unit}, the cycler's own counter, {compared}"
    return ""


def read_lines(profile: Profile, table: RawTable, trace: Trace) -> list[str]:
    """The profile, the file, the mapped columns, the first and last rows and the metadata."""
    kind = profile.file_format
    n = len(trace)
    where = trace.span(0, n - 1) if n else "no rows"
    lines = [
        f"profile  {profile.name}" + (f": {profile.description}" if profile.description else ""),
        f"file     {table.name}: {kind}, {n} rows ({where})",
        "",
        "columns",
    ]
    rows = [["quantity", "column", "read as"]]
    for quantity, index in sorted(table.columns.items(), key=lambda item: item[1]):
        rows.append([quantity, table.header(index), _units(profile, quantity)])
    lines += _table(rows, left=3)
    unread = [f for i, f in enumerate(table.head.fields) if i not in table.columns.values() and f]
    if unread:
        lines.append("  not read: " + ", ".join(unread))
    lines += ["", "first and last rows (s, V, A; positive = charge)"]
    header = ["where", "time_s", "voltage_V", "current_A"]
    if trace.temperature_c is not None:
        header.append("temperature_C")
    if trace.step is not None:
        header.append("step")
    if trace.cycle is not None:
        header.append("cycle")
    shown = list(range(min(END_ROWS, n))) + list(range(max(END_ROWS, n - END_ROWS), n))
    rows = [header]
    for k, row in enumerate(shown):
        if k == END_ROWS and row > END_ROWS:
            rows.append(["..."] + [""] * (len(header) - 1))
        cells = [
            trace.place(row),
            _number(float(trace.time_s[row]), 3),
            _number(float(trace.voltage_v[row]), 5),
            _number(float(trace.current_a[row]), 5),
        ]
        if trace.temperature_c is not None:
            cells.append(_number(float(trace.temperature_c[row]), 2))
        if trace.step is not None:
            cells.append(str(int(trace.step[row])))
        if trace.cycle is not None:
            cells.append(str(int(trace.cycle[row])))
        rows.append(cells)
    lines += _table(rows)
    lines += ["", "metadata"]
    rows = [[key, value, _origin(key, value, profile, table)] for key, value in trace.metadata.items()]
    lines += _table(rows, left=3) if rows else ["  none"]
    return lines


def _origin(key: str, value: str, profile: Profile, table: RawTable) -> str:
    """Where a metadata value came from: the file's line (or row), its name, the profile, the stamps."""
    head = table.head
    if key in head.metadata_lines and head.metadata.get(key) == value:
        line = head.metadata_lines[key]
        if not head.unit:
            return "the file's key/value metadata"
        return f"{head.unit} {line}" + (f" of sheet '{head.sheet}'" if head.sheet else "")
    pattern = profile.file_name_pattern
    if pattern is not None:
        found = pattern.search(table.name.replace("\\", "/").rpartition("/")[2])
        if found is not None and (found.groupdict().get(key) or "").strip() == value:
            return "the file name"
    if value == MISSING and key not in profile.metadata:
        return "not in the file: a check asks for it"
    if profile.metadata.get(key) == value:
        return "the profile"
    if key == "started_at":
        return "the first time stamp"
    return ""


# ---------------------------------------------------------------- the steps


def step_lines(segmentation: Segmentation, rule_words: str) -> list[str]:
    """The steps the judge would cut: kind, control, start and end, rows, current, charge."""
    band = segmentation.band
    lines = [f"steps ({rule_words})"]
    if band is not None:
        lines.append(
            f"  rest: current within {band.threshold_a:.4g} A of the channel's zero offset "
            f"{band.offset_a:.4g} A"
        )
    rows = [["#", "kind", "control", "start_s", "end_s", "rows", "current_A", "charge_Ah", "program step"]]
    for step in segmentation.steps:
        rows.append(
            [
                str(step.index + 1),
                step.kind.value,
                "" if step.mode.value == "none" else step.mode.value.upper(),
                f"{step.start_s:.1f}",
                f"{step.end_s:.1f}",
                str(step.rows),
                f"{step.mean_current_a:.4f}",
                f"{step.capacity_ah:.4f}",
                "" if step.program_step is None else str(step.program_step),
            ]
        )
    lines += _table(rows, left=3)
    steps, cycles = len(segmentation.steps), len(segmentation.cycles)
    lines.append(f"  {steps} step{'' if steps == 1 else 's'} in {cycles} cycle{'' if cycles == 1 else 's'}")
    return lines


# ---------------------------------------------------------------- the parser


def add_commands(sub: Any) -> None:
    """Add `profile guess` and `profile show` to the command line's sub-commands."""
    profile = sub.add_parser(
        "profile",
        help="write an import profile for a file, and see what a profile reads",
        epilog="example: formgate profile guess export.csv -o rules/profiles/export.toml",
    )
    actions = profile.add_subparsers(dest="profile_command", required=True, metavar="ACTION")
    guess = actions.add_parser(
        "guess",
        help="print a commented import profile guessed from a cycle file",
        description="Guess an import profile from one cycle file (text, workbook or Parquet): "
        "its delimiter, decimal mark, encoding, header, columns, units, time stamps and the "
        "current's sign. Each key says why it was chosen; 'unsure:' marks a guess to check.",
        epilog="example: formgate profile guess export.csv -o rules/profiles/export.toml",
    )
    guess.add_argument("file", metavar="FILE", help="a cycle file of the layout")
    guess.add_argument(
        "-o", "--out", metavar="OUT", help="write the profile to this file (default: print it)"
    )
    guess.set_defaults(func=cmd_profile_guess)
    show = actions.add_parser(
        "show",
        help="print what formgate reads from a file with a profile, and the steps it would cut",
        description="Read one file with an import profile and print the mapped columns with "
        "their units, the first and last rows in s, V and A (positive = charge), the metadata "
        "and where it came from, and the steps the judge would cut, with the rule set of the "
        "file's cell type.",
        epilog="example: formgate profile show rules/profiles/export.toml export.csv",
    )
    show.add_argument("profile", metavar="PROFILE", help="the import profile (TOML)")
    show.add_argument("file", metavar="FILE", help="a cycle file to read with it")
    show.add_argument("--rules", default="rules", help="folder of rule files (default: rules)")
    show.set_defaults(func=cmd_profile_show)
