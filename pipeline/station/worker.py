"""What a station worker process does with one claimed file: judge it and render its outputs.

Runs in long-lived worker processes (the import of the rendering stack is paid
once per process, not per file). It reads the claimed file, judges it, and
renders the JSON *text* (and, when the task asks, the PDF bytes); it writes nothing.
A station's certificates are rendered later, from its queue (certqueue.py). An OCV reading file (told by its
header, read.readings.looks_like_readings) is read into its readings instead. The station's main process
records the result and only then writes the files (order of effects in
docs/station.md), so a crash can never leave a certificate without its ledger row.
"""

from __future__ import annotations

import dataclasses
import datetime
import gc
import hashlib
import logging
import os
import resource
import select
import signal
import threading
import time
import traceback
from dataclasses import dataclass
from pathlib import Path

from pipeline.acceptance.results import CellResult, VerdictKind
from pipeline.errors import FormgateError, InputError
from pipeline.model import ChannelClasses, SourceRef
from pipeline.names import cell_file_stem
from pipeline.read.cyclehead import MAX_UNCOMPRESSED_BYTES
from pipeline.read.limits import TextLimits, check_text
from pipeline.read.readings import ReadingFile, looks_like_readings, read_readings
from pipeline.rulebook.book import RuleBook
from pipeline.station.board import Board

log = logging.getLogger("formgate.worker")



@dataclass(frozen=True, slots=True)
class Task:
    """One claimed file to judge. ``profile_text`` is the import profile's TOML, if any."""

    input_id: int
    work_path: str
    name: str
    sha256: str
    rulebook: RuleBook
    analysed_at: datetime.datetime
    profile_name: str | None = None
    profile_text: str | None = None
    max_uncompressed_bytes: int = MAX_UNCOMPRESSED_BYTES
    certify: str = "all"  # "all", "failed_and_held" (no PDF for a passed cell) or "none"
    limits: TextLimits | None = None  # longest line and most rows; None: not checked
    memory_note: str = ""  # names the worker's memory limit in a quarantine reason
    ledger_path: str | None = None  # read-only: the cell's other records for its certificate
    accuracy: ChannelClasses | None = None  # the inbox's channels' classes ([accuracy.ID])


@dataclass(frozen=True, slots=True)
class Output:
    """A judged cell with its rendered bytes, or the reason it could not be judged.

    ``bug`` is True when the reason is an unexpected exception in formgate itself
    (the file is still quarantined, and the traceback goes to the log).
    """

    input_id: int
    result: CellResult | None
    json_text: str | None
    pdf: bytes | None
    error: str | None
    seconds: float
    bug: bool = False
    detail: str = ""
    readings: ReadingFile | None = None  # an OCV reading file: its readings, and no result


# The board this worker notes its current input on, and its row there (judges.py).
_board: Board | None = None
_row = -1


def init_worker(
    station_pid: int | None = None,
    board: Board | None = None,
    memory_limit_bytes: int | None = None,
) -> None:
    """Worker start-up: leave Ctrl-C to the station, end with the station, ``prepare_process``,
    take a row on the station's ``board``, then limit this process's memory.

    The limit is on the address space (RLIMIT_AS), set after the imports, so that it
    bounds what judging one file may add; past it an allocation fails with MemoryError
    (the file is quarantined with the limit named) instead of the machine swapping.
    """
    global _board, _row
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    if station_pid is not None:
        exit_with(station_pid)
    prepare_process()
    if board is not None:
        _board, _row = board, board.take_row(os.getpid())
    if memory_limit_bytes is not None:
        resource.setrlimit(resource.RLIMIT_AS, (memory_limit_bytes, memory_limit_bytes))


def exit_with(pid: int) -> None:
    """End this process as soon as process ``pid`` (the station) has ended, however it ended.

    A pool worker waits for work on a pipe whose other end it holds itself, so it never
    learns that a killed station is gone; and it keeps the pool's fork server alive. Without
    this, every station killed by a signal (a crash, the OOM killer, a power-off test) left
    its workers behind, some 150 MiB each. The station's files are safe: the next station
    finds them in work/ and judges them again.
    """
    try:
        handle: int | None = os.pidfd_open(pid)  # Linux 5.3+: readable once the process ends
    except (AttributeError, OSError):
        handle = None

    def watch() -> None:
        if handle is not None:
            select.select([handle], [], [])
        else:
            while True:
                time.sleep(2.0)
                try:
                    os.kill(pid, 0)
                except ProcessLookupError:
                    break
                except PermissionError:
                    continue
        os._exit(0)

    threading.Thread(target=watch, name="formgate-exit-with-station", daemon=True).start()


def prepare_process() -> None:
    """Import the judging and rendering stack once, parse the certificate stylesheet and
    font, then take all of it out of the garbage collector's sight.

    After the imports a process holds a few hundred thousand long-lived objects
    (modules, functions, the parsed stylesheet). Every full collection walked all of
    them again, several times per certificate, for nothing: ``gc.freeze`` moves them
    into a generation the collector never scans (measured: a certificate 10-15 %
    faster). Objects made while judging and rendering are collected as before.
    """
    import pipeline.judge.metrics  # the runner imports the judging stack only when it judges
    import pipeline.judge.segmentation
    import pipeline.read.profile
    import pipeline.report.pdf  # with pipeline.report.certificate
    import pipeline.report.result
    import pipeline.runner  # imported here so that their objects are frozen too

    pipeline.report.pdf.prepare()
    gc.collect()
    gc.freeze()


def run_task(task: Task) -> Output:
    """Judge and render one file; never raises (a bug becomes an error Output)."""
    if _board is not None:
        _board.note(_row, task.input_id)
    try:
        return _run(task)
    finally:
        if _board is not None:
            _board.note(_row, 0)


def _run(task: Task) -> Output:
    started = time.perf_counter()
    try:
        judged = _judge_and_render(task)
        if isinstance(judged, ReadingFile):
            return Output(task.input_id, None, None, None, None, time.perf_counter() - started,
                          readings=judged)
        result, json_text, pdf = judged
    except FormgateError as exc:
        return Output(task.input_id, None, None, None, str(exc), time.perf_counter() - started)
    except MemoryError:
        reason = (
            f"{task.name}: judging the file needs more memory than a worker may use"
            f"{task.memory_note}; it was not judged.\n  Check that it is one cell's record; if "
            "such files are expected, raise worker_memory_MB in station.toml."
        )
        return Output(task.input_id, None, None, None, reason, time.perf_counter() - started)
    except Exception as exc:
        reason = (
            f"{task.name}: formgate could not judge this file because of an internal error "
            f"({type(exc).__name__}: {exc}).\n  The station log has the details; please report it."
        )
        detail = "".join(traceback.format_exception(exc))
        return Output(
            task.input_id, None, None, None, reason, time.perf_counter() - started, True, detail
        )
    return Output(task.input_id, result, json_text, pdf, None, time.perf_counter() - started)


def _judge_and_render(task: Task) -> tuple[CellResult, str, bytes | None] | ReadingFile:
    """Judge a cycle file and render its outputs, or read an OCV reading file's readings.

    A station's tasks render no certificate (``certify = "none"``): it queues them and
    renders them when workers are free (certqueue.py). ``formgate check`` renders at once.
    """
    from pipeline.report.result import to_json

    result = judge_task(task)
    if isinstance(result, ReadingFile):
        return result
    json_text = to_json(result)
    pdf = None
    wanted = task.certify == "all" or (
        task.certify == "failed_and_held" and result.verdict.kind is not VerdictKind.PASS
    )
    if wanted:
        pdf = render_certificate(result, json_text, cell_certificate_name(task, result))
    return result, json_text, pdf


def cell_certificate_name(task: Task, result: CellResult) -> str | None:
    """The cell's own certificate's file name, which a station's record certificate names."""
    return None if task.ledger_path is None else f"{cell_file_stem(result.cell_id)}.pdf"


def render_certificate(
    result: CellResult, json_text: str, cell_certificate: str | None, channel_note: str = ""
) -> bytes:
    """The record's certificate: it carries the code of the very JSON text published with it
    (and, from a station, a note when the channel that tested it was suspect)."""
    from pipeline.report.certificate import render_html
    from pipeline.report.pdf import render_pdf
    from pipeline.report.verification import verification_code

    return render_pdf(
        render_html(result, verification_code(json_text), cell_certificate=cell_certificate,
                    channel_note=channel_note)
    )


def as_drawn(result: CellResult) -> CellResult:
    """The result with only what its record certificate draws: a passed cell's certificate is
    one page without plots (report/certificate.py), so its curves and views (some 75 kB of the
    80) are left out; a failed or held cell's result is the result itself. The same PDF bytes
    either way (tests/test_certqueue.py), from a result a fifteenth of the size to keep and send."""
    from pipeline.report.certificate import is_one_page

    if not is_one_page(result):
        return result
    metrics = dataclasses.replace(
        result.metrics, grading_curve=None, ica_curve=None, record=None, rest=None, pulse=None
    )
    return dataclasses.replace(result, metrics=metrics)


def judge_task(task: Task) -> CellResult | ReadingFile:
    """Judge the task's file (with its cell's other records when a ledger is named), or read
    an OCV reading file's readings. Raises FormgateError for a file that cannot be judged."""
    from pipeline.read.profile import load_profile
    from pipeline.runner import judge

    try:
        data = Path(task.work_path).read_bytes()
    except OSError as exc:
        raise InputError(
            f"the file cannot be read ({exc.strerror or exc})",
            SourceRef(task.name),
            "Let the station's user read it, then drop it into the inbox again.",
        ) from None
    digest = hashlib.sha256(data).hexdigest()
    if digest != task.sha256:
        raise InputError(
            "the file changed after it was claimed",
            SourceRef(task.name),
            "A writer still had it open: make the cycler finish writing before hand-over.",
        )
    profile = None
    if task.profile_text is not None:
        profile = load_profile(task.profile_text, task.profile_name or "import profile")
    # a workbook's or Parquet file's lines mean nothing: its reader bounds what it unpacks
    if task.limits is not None and (profile is None or profile.file_format == "text"):
        check_text(data, task.name, task.limits)
    if looks_like_readings(data):
        return read_readings(data, task.name)
    result = judge(
        data,
        task.name,
        task.rulebook,
        analysed_at=task.analysed_at,
        profile=profile,
        max_uncompressed_bytes=task.max_uncompressed_bytes,
        input_sha256=digest,
        accuracy=task.accuracy,
    )
    if task.ledger_path is not None:
        from pipeline.ledger.history import with_history

        result = with_history(result, Path(task.ledger_path), task.input_id)
    return result
