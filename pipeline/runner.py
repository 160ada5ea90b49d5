"""The one place that strings the steps together: bytes -> CellResult -> JSON and PDF on disk.

``judge`` is pure (bytes, rules and the analysis time in; a CellResult out, or a
FormgateError raised). ``publish`` writes a judged cell's result and certificate
atomically. ``check_file`` does both for a path; the CLI and the station call it.
"""

from __future__ import annotations

import dataclasses
import datetime
import hashlib
from dataclasses import dataclass
from pathlib import Path

from pipeline import __version__
from pipeline.acceptance.results import CellResult, RuleSetRef, VerdictKind
from pipeline.acceptance.rules import WHOLE_PROGRAM
from pipeline.errors import FormgateError, InputError
from pipeline.model import DEFAULT_ACCURACY, AccuracyClass, ChannelClasses, SourceRef, Trace
from pipeline.names import safe_name
from pipeline.read.cyclefile import file_stages, read_cycle_file
from pipeline.read.cyclehead import MAX_UNCOMPRESSED_BYTES
from pipeline.read.profile import Profile
from pipeline.read.readings import looks_like_readings, read_readings
from pipeline.read.validate import validated
from pipeline.rulebook.book import RuleBook
from pipeline.writing import write_atomic


def judge(
    data: bytes,
    name: str,
    rulebook: RuleBook,
    *,
    analysed_at: datetime.datetime,
    profile: Profile | None = None,
    max_uncompressed_bytes: int = MAX_UNCOMPRESSED_BYTES,
    input_sha256: str | None = None,
    accuracy: ChannelClasses | AccuracyClass | None = None,
) -> CellResult:
    """Read, validate, segment, measure and judge one cycle file's bytes.

    Raises a FormgateError (InputError) when the file cannot be read, matched to a
    rule set, or is implausible; that is the ``error`` verdict, with its reason.

    The channel's accuracy class, which every metric's uncertainty starts from, is the
    one ``accuracy`` gives for the record's channel (a station's settings), else the
    import profile's, else the default class.
    """
    trace = read_cycle_file(data, name, profile, max_uncompressed_bytes=max_uncompressed_bytes)
    return judge_trace(
        trace,
        name,
        rulebook,
        analysed_at=analysed_at,
        # a caller that has just hashed the bytes (the station's worker) passes the digest in
        input_sha256=input_sha256 or hashlib.sha256(data).hexdigest(),
        accuracy=choose_accuracy(accuracy, trace.metadata.get("channel"), profile),
    )


def choose_accuracy(
    accuracy: ChannelClasses | AccuracyClass | None, channel: str | None, profile: Profile | None
) -> AccuracyClass:
    """The class of the record's channel: the station's for it, else the profile's, else the default."""
    chosen = accuracy.choose(channel) if isinstance(accuracy, ChannelClasses) else accuracy
    if chosen is None and profile is not None:
        chosen = profile.accuracy
    return chosen or DEFAULT_ACCURACY


def judge_trace(
    trace: Trace,
    name: str,
    rulebook: RuleBook,
    *,
    analysed_at: datetime.datetime,
    input_sha256: str,
    accuracy: ChannelClasses | AccuracyClass | None = None,
) -> CellResult:
    """Validate, segment, measure and judge one record already read (:func:`judge`)."""
    # The judging stack (scipy's signal processing among it) is imported once a file has
    # been read: a file refused by hand costs a fraction of a second, not the stack's import.
    # A station's worker imports it before its first cell (worker.prepare_process).
    from pipeline.judge.evaluate import evaluate
    from pipeline.judge.metrics import measure
    from pipeline.judge.rest_band import estimate_band, take_out_offset
    from pipeline.judge.segmentation import split_steps
    from pipeline.judge.uncertainty import budgets, expanded, with_range

    stages = file_stages(trace.metadata)  # a file of one stage is judged on that stage's checks
    rule_set, cell_type = rulebook.for_cell_type(trace.cell_type, source=name)
    trace, notes = validated(trace, cell_type)  # checked, then without its empty rows
    one_c_a = cell_type.nominal_capacity_ah  # 1 C in A is the nominal capacity in Ah per hour
    rest_a = rule_set.rest_current_fraction * one_c_a
    band = estimate_band(trace.current_a, rest_a, one_c_a)
    if rule_set.zero_offset == "corrected":  # the channel's zero offset, out of every row
        trace, band = take_out_offset(trace, band)
    segmentation = split_steps(trace, rest_a, one_c_a, band)
    metrics = measure(
        trace,
        segmentation,
        rule_set.plateau,
        program=rule_set.program,
        dcir_pulse_s=rule_set.dcir_pulse_s,
        relax_s=rule_set.relax_s,
        stages=stages,
    )
    chosen = with_range(choose_accuracy(accuracy, trace.metadata.get("channel"), None), trace)
    found = budgets(trace, segmentation, metrics, chosen, segmentation.band, rule_set.plateau,
                    offset_estimated=rule_set.zero_offset == "corrected")
    metrics = dataclasses.replace(metrics, uncertainty=expanded(found))
    all_notes = trace.notes + notes + segmentation.notes + metrics.notes
    verdict = evaluate(rule_set, cell_type, metrics, all_notes, stages=stages)
    return CellResult(
        # certificates name files, not the folders of the machine that judged them
        source_name=Path(name).name,
        input_sha256=input_sha256,
        metadata=trace.metadata,
        cell_type=cell_type,
        rule_set=RuleSetRef(
            rule_set.name,
            rule_set.revision,
            rule_set.sha256,
            Path(rule_set.source).name,
            rule_set.family,
        ),
        needed_stages=cell_type.stages or rule_set.stages,
        metrics=metrics,
        verdict=verdict,
        notes=all_notes,
        analysed_at=analysed_at,
        software_version=__version__,
        current_band=segmentation.band,
        stages=stages,
        accuracy=chosen,
    )


@dataclass(frozen=True, slots=True)
class Published:
    """Where a judged cell's outputs were written (certificate None when not rendered)."""

    result_json: Path
    certificate: Path | None


def result_paths(results: Path, certificates: Path, result: CellResult) -> tuple[Path, Path]:
    """``<results>/<lot>/<cell_id>.json`` and ``<certificates>/<lot>/<cell_id>.pdf``, safe names.

    A file of one stage gets its stage after a ``~`` (``<cell_id>~formation.json``), so a
    cell's formation and grading files never replace each other's outputs; no safe cell
    id holds a ``~``, so no other cell's name can meet it.
    """
    lot, cell = safe_name(result.lot), safe_name(result.cell_id)
    if tuple(result.stages) != WHOLE_PROGRAM:
        cell += "~" + "+".join(result.stages)
    return results / lot / f"{cell}.json", certificates / lot / f"{cell}.pdf"


def output_paths(out: Path, result: CellResult) -> tuple[Path, Path]:
    """``results/<lot>/<cell_id>.json`` and ``certificates/<lot>/<cell_id>.pdf`` under ``out``."""
    return result_paths(out / "results", out / "certificates", result)


def publish(result: CellResult, out: Path, *, certificate: bool = True) -> Published:
    """Write the JSON result and (for pass/fail/hold) the PDF certificate, atomically."""
    from pipeline.report.result import to_json  # imported here: `check` without --out writes nothing

    json_path, pdf_path = output_paths(out, result)
    json_text = to_json(result)
    write_atomic(json_text.encode("utf-8"), json_path)
    if not certificate or result.verdict.kind is VerdictKind.ERROR:
        return Published(json_path, None)
    from pipeline.report.certificate import render_html  # imported here: WeasyPrint is slow to import
    from pipeline.report.pdf import render_pdf
    from pipeline.report.verification import verification_code

    # the same verification code as a station's certificate: the JSON's, written above
    write_atomic(render_pdf(render_html(result, verification_code(json_text))), pdf_path)
    return Published(json_path, pdf_path)


def _readings_error(data: bytes, name: str) -> InputError:
    """Why an OCV reading file is not judged by hand: its readings are a whole lot's aging
    stage, which only means something beside each cell's own records, as a station keeps them."""
    what = "an OCV reading file"
    try:
        found = read_readings(data, name)
    except FormgateError:
        pass  # a station would quarantine it with the reader's own words; here it is enough
    else:
        cells = {(r.lot, r.cell_id) for r in found.readings}
        lots = sorted({lot for lot, _ in cells})
        what += (
            f" ({len(found.readings)} reading{'s' if len(found.readings) != 1 else ''} of "
            f"{len(cells)} cell{'s' if len(cells) != 1 else ''} of lot{'s' if len(lots) != 1 else ''} "
            f"{', '.join(lots)})"
        )
    return InputError(
        f"{what}, not a cycle file: formgate check judges one cell's cycle file at a time",
        SourceRef(name),
        "Drop it into a station's inbox (formgate watch): the station keeps the readings and "
        "decides each cell's aging stage with the cell's other records.",
    )


@dataclass(frozen=True, slots=True)
class FileOutcome:
    """What happened to one input: a judged result or the error that stopped it."""

    name: str
    result: CellResult | None
    error: FormgateError | None
    published: Published | None = None


def check_file(
    path: Path,
    rulebook: RuleBook,
    out: Path | None,
    *,
    analysed_at: datetime.datetime,
    profile: Profile | None = None,
    certificate: bool = True,
) -> FileOutcome:
    """Judge the file at ``path`` and, when ``out`` is given, publish its outputs."""
    name = str(path)
    try:
        data = path.read_bytes()
    except OSError as exc:
        problem = f"cannot read the file ({exc.strerror})"
        error = InputError(problem, SourceRef(name), "Check the path and its permissions.")
        return FileOutcome(name, None, error)
    if looks_like_readings(data):
        return FileOutcome(name, None, _readings_error(data, name))
    try:
        result = judge(data, name, rulebook, analysed_at=analysed_at, profile=profile)
    except FormgateError as exc:
        return FileOutcome(name, None, exc)
    published = publish(result, out, certificate=certificate) if out is not None else None
    return FileOutcome(name, result, None, published)
