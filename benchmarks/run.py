"""Measures how fast formgate judges and certifies cells, and writes the table to docs/performance.md.

Run it with `make bench` (about 5-6 minutes on 2 cores), or for a short look with
``.venv/bin/python benchmarks/run.py --quick`` (about 3 minutes, not written to the
docs). It invents its own cycle files of realistic size in a
temporary folder, times every stage of the pipeline with several repeats, runs a
real station on pre-filled inboxes, and watches the memory of a long-lived worker.
Ratios are taken from measurements interleaved in the same run, so a busy machine
slows both sides alike. benchmarks/README.md says what each row means.

Only the standard library is imported at module level: the station's worker
processes import this file as their main module when they start, and must not
pay for anything the station itself would not import.
"""

from __future__ import annotations

import argparse
import contextlib
import datetime
import gc
import hashlib
import json
import math
import os
import platform
import shutil
import sqlite3
import statistics
import subprocess
import sys
import tempfile
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

REPO = Path(__file__).resolve().parent.parent
if str(REPO) not in sys.path:
    sys.path.insert(0, str(REPO))

from pipeline.cli.main import SINGLE_THREADED_MATH  # noqa: E402  (light: argparse and os)

# One math thread per process, as formgate's command line sets it before numpy is imported
# (a user's choice stands): the station's workers inherit it from this process. Left at the
# library's default, the judge path's least-squares fits start a second BLAS thread that keeps
# spinning on the other core after each fit, slowing whatever is timed next (a certificate
# measured some 40 % slower) and the station's workers alike.
for _key, _value in SINGLE_THREADED_MATH.items():
    os.environ.setdefault(_key, _value)

DOC = REPO / "docs" / "performance.md"
BEGIN = "<!-- benchmark table: begin (written by benchmarks/run.py; do not edit by hand) -->"
END = "<!-- benchmark table: end -->"
MIB = 2**20
DASH = "\N{EN DASH}"
ANALYSED_AT = datetime.datetime(2026, 3, 2, 12, 0, tzinfo=datetime.UTC)

# Targets (the speed requirements this table is read against).
TARGET_JUDGE_RATIO = 1.5  # judge path / pandas.read_csv of the same bytes
TARGET_CERT_RATIO = 0.35  # a passed cell's certificate in the station / naive render of the full one
TARGET_FAILED_CERT_RATIO = 0.6  # a failed cell's certificate in the station / the same naive render
# judged cells/s of a 2-worker station with certificates on / the same with them off
TARGET_ON_OFF = 0.9
TARGET_PEAK_MIB = 350.0  # peak RSS per worker
FLAT_GROWTH = 0.05  # RSS may grow by this fraction from cell 100 to the last cell (our own bound)
FAIL_EVERY = 20  # one cell in 20 fails (95 % yield: our own choice for a line in production)
STATION_SECONDS = 25.0  # pre-filled work per station run, aimed at (each must last >= 20 s)


@dataclass(frozen=True, slots=True)
class Mode:
    """How much to measure: the full run, or a short one for trying things out."""

    name: str
    repeats: int  # expensive stages (rendering)
    cheap_repeats: int  # stages of a few ms or less
    batch_certificates: int
    batch_repeats: int
    import_repeats: int
    station_seconds: float
    rss_cells: int
    rss_render_every: int = 10
    burst_files: int = 500  # files of each station run (a rack's burst, in the inbox at once)
    pass_records: int = 3
    redo_short_runs: bool = True  # run a station again with more files if it ended too soon


FULL = Mode("full", 7, 21, 8, 3, 5, STATION_SECONDS, 1000)
QUICK = Mode("quick", 3, 7, 3, 2, 2, 6.0, 200, burst_files=100, pass_records=1)
# Checks that the benchmark still runs (the tests run it); its figures mean nothing.
SMOKE = Mode(
    "smoke", 1, 2, 2, 1, 1, 1.0, 200, burst_files=24, pass_records=1, redo_short_runs=False
)


# ---------------------------------------------------------------- invented input files


@dataclass(frozen=True, slots=True)
class Record:
    """One simulated cell's cycle file without its metadata lines, and what it is."""

    body: bytes  # header row and data rows
    rows: int
    hours: float
    defect: str
    metadata: dict[str, str]

    def file_bytes(self, cell_id: str | None = None, lot: str | None = None) -> bytes:
        meta = dict(self.metadata)
        if cell_id is not None:
            meta["cell_id"] = cell_id
        if lot is not None:
            meta["lot"] = lot
        head = "".join(f"# {k}: {v}\n" for k, v in meta.items())
        return head.encode("utf-8") + self.body


def make_records(mode: Mode) -> tuple[list[Record], list[Record]]:
    """Passing and failing invented DEMO-LFP-20A cells, about 72,000 rows (20 h at 1 Hz) each."""
    import dataclasses

    import numpy as np

    from pipeline.demo import cellmodel, cycletext, synth
    from pipeline.demo import lots as demo

    # A shorter formation program than the demo's, so that 1 Hz sampling gives about
    # 72,000 rows; every rate stays inside the ranges of cellmodel.FormationProgram's notes.
    # The final rest is the 3 h the shipped rule sets' [program] asks for; the rests
    # between steps are shorter instead.
    program = cellmodel.FormationProgram(
        pre_charge_rate_c=0.1,
        charge_rate_c=0.3,
        rest_after_charge_s=600.0,
        discharge_rate_c=0.25,
        rest_after_discharge_s=600.0,
        rest_before_grading_s=600.0,
        final_rest_s=10800.0,
    )
    normal = [c for c in demo.DEMO_CELLS if not c.defect][: mode.pass_records]
    defective = [c for c in demo.DEMO_CELLS if c.defect]
    if mode.name != "full":
        defective = defective[:2]
    out: tuple[list[Record], list[Record]] = ([], [])
    for k, cell in enumerate(normal + defective):
        cell = dataclasses.replace(cell, compressed=False)
        rng = np.random.default_rng([2026, k])
        recipe = dataclasses.replace(demo.demo_recipe(cell, rng), sample_interval_s=1.0, program=program)
        record = synth.simulate_formation(recipe, rng)
        body = cycletext.to_cycle_file(record, {}).encode("utf-8")
        meta = demo.demo_metadata(cell)
        meta["station"] = "bench-line-1"
        rec = Record(body, len(record), float(record.time_s[-1]) / 3600.0, cell.defect, meta)
        out[1 if cell.defect else 0].append(rec)
    return out


def pool_entry(n: int, passing: list[Record], failing: list[Record]) -> tuple[str, bytes, bool]:
    """File ``n`` of a station's inbox: unique bytes (its own cell id), one in FAIL_EVERY failing."""
    fails = n % FAIL_EVERY == FAIL_EVERY // 2
    record = failing[(n // FAIL_EVERY) % len(failing)] if fails else passing[n % len(passing)]
    lot = f"BENCH-LOT-{n // 200 + 1:02d}"
    cell_id = f"B{n:05d}"
    return f"{lot}_{cell_id}.csv", record.file_bytes(cell_id, lot), fails


class Pool:
    """Input files written once into a folder; each station run hard-links the ones it needs."""

    def __init__(self, folder: Path, passing: list[Record], failing: list[Record]) -> None:
        folder.mkdir()
        self.folder, self.passing, self.failing = folder, passing, failing
        self.entries: list[tuple[Path, bool]] = []

    def ensure(self, n: int) -> None:
        if n > len(self.entries):
            print(f"  writing input files {len(self.entries) + 1}-{n} ...", flush=True)
        for k in range(len(self.entries), n):
            name, data, fails = pool_entry(k, self.passing, self.failing)
            (self.folder / name).write_bytes(data)
            self.entries.append((self.folder / name, fails))


# ---------------------------------------------------------------- timing


@dataclass(slots=True)
class Timing:
    """Seconds of each repeat of one measured thing."""

    label: str
    values: list[float] = field(default_factory=list)
    note: str = ""

    @property
    def median(self) -> float:
        return statistics.median(self.values)

    def quartiles(self) -> tuple[float, float]:
        if len(self.values) < 2:
            return self.values[0], self.values[0]
        q = statistics.quantiles(self.values, n=4, method="inclusive")
        return q[0], q[2]


def interleave(things: dict[str, Callable[[], object]], repeats: int) -> dict[str, Timing]:
    """Time each callable ``repeats`` times, taking turns (order reversed every other round).

    One untimed call of each first: the station's workers are warm too.
    """
    for fn in things.values():
        fn()
    timings = {name: Timing(name) for name in things}
    names = list(things)
    for r in range(repeats):
        gc.collect()
        for name in names if r % 2 == 0 else reversed(names):
            t0 = time.perf_counter()
            things[name]()
            timings[name].values.append(time.perf_counter() - t0)
    return timings


def fmt_s(seconds: float) -> str:
    if seconds < 0.01:
        return f"{seconds * 1000:.2f} ms"
    if seconds < 1.0:
        return f"{seconds * 1000:.1f} ms"
    return f"{seconds:.2f} s"


def fmt_range(low: float, high: float) -> str:
    a, b = fmt_s(low), fmt_s(high)
    unit_a, unit_b = a.split()[1], b.split()[1]
    return f"{a.split()[0]}{DASH}{b}" if unit_a == unit_b else f"{a}{DASH}{b}"


# ---------------------------------------------------------------- stages in one process


@dataclass(slots=True)
class Micro:
    """Everything measured inside this process."""

    stages: list[Timing]
    references: list[Timing]
    judge_ratio: list[float]
    cert_ratio: list[float]
    cert_per_cell: Timing
    naive: Timing
    judge_path: Timing
    pandas: Timing
    pages: int
    font_share: float
    pdf_bytes: int
    # the record read as a workbook and as a Parquet file, each against pandas.read_csv of its
    # text, per repeat: label -> (ratios, reader's timing)
    layout_ratios: dict[str, tuple[list[float], Timing]] = field(default_factory=dict)
    # a failed cell's certificate in the worker ÷ the naive render of the passed cell's full
    # three-page certificate, per repeat, and its cost
    failed_ratio: list[float] = field(default_factory=list)
    failed_cert: Timing | None = None


def other_layouts(data: bytes, metadata: dict[str, str]) -> tuple[bytes, bytes]:
    """The record of cycle file ``data`` as a workbook (.xlsx) and as a Parquet file.

    The workbook holds the metadata on a sheet "Info" (key, value) and the rows on a sheet
    "Record" under the same header, written by openpyxl; the Parquet file holds the same
    columns and the metadata as its key/value metadata, written by pyarrow.
    """
    import io

    import openpyxl
    import pandas as pd
    import pyarrow as pa
    import pyarrow.parquet as pq

    frame = pd.read_csv(io.BytesIO(data), comment="#")
    book = openpyxl.Workbook(write_only=True)
    info = book.create_sheet("Info")
    for key, value in metadata.items():
        info.append([key, value])
    sheet = book.create_sheet("Record")
    sheet.append(list(frame.columns))
    for row in zip(*(frame[c].tolist() for c in frame.columns), strict=True):
        sheet.append(list(row))
    workbook = io.BytesIO()
    book.save(workbook)
    table = pa.Table.from_pandas(frame, preserve_index=False).replace_schema_metadata(metadata)
    parquet = io.BytesIO()
    pq.write_table(table, parquet)
    return workbook.getvalue(), parquet.getvalue()


def measure_stages(mode: Mode, passing: list[Record], failing: list[Record], tmp: Path) -> Micro:
    import io

    import pandas as pd
    import weasyprint

    from pipeline.judge.evaluate import evaluate
    from pipeline.judge.metrics import measure
    from pipeline.judge.segmentation import split_steps
    from pipeline.ledger.ledger import Ledger
    from pipeline.ledger.rows import CheckRowData
    from pipeline.mail.letters import build_message, failure_letter
    from pipeline.read.cyclefile import read_cycle_file
    from pipeline.read.profile import load_profile
    from pipeline.read.validate import validated
    from pipeline.report import plots
    from pipeline.report.certificate import PLOT_HEIGHT_MM, PLOT_WIDTH_MM, TEMPLATES_DIR, render_html
    from pipeline.report.pdf import render_pdf
    from pipeline.report.result import to_json
    from pipeline.rulebook.book import load_rules_dir
    from pipeline.runner import judge
    from pipeline.station.worker import Task, run_task

    rulebook = load_rules_dir(REPO / "rules")
    data = passing[0].file_bytes()
    name = "DEMO-LOT-01_L01-001.csv"
    trace = read_cycle_file(data, name, None)
    rule_set, cell_type = rulebook.for_cell_type(trace.cell_type, source=name)
    book_bytes, parquet_bytes = other_layouts(data, passing[0].metadata)
    book_profile = load_profile(
        '[file]\nformat = "workbook"\n[workbook]\ndata_sheets = "Record"\nmetadata_sheet = "Info"\n',
        "bench_workbook.toml",
    )
    parquet_profile = load_profile('[file]\nformat = "parquet"\n', "bench_parquet.toml")
    for layout_bytes, layout_profile in ((book_bytes, book_profile), (parquet_bytes, parquet_profile)):
        assert len(read_cycle_file(layout_bytes, "bench", layout_profile)) == len(trace)

    def vsm() -> object:
        kept, notes = validated(trace, cell_type)  # as the judge path validates
        one_c_a = cell_type.nominal_capacity_ah
        seg = split_steps(kept, rule_set.rest_current_fraction * one_c_a, one_c_a)
        return measure(
            kept,
            seg,
            rule_set.plateau,
            program=rule_set.program,
            dcir_pulse_s=rule_set.dcir_pulse_s,
            relax_s=rule_set.relax_s,
        ), notes

    result = judge(data, name, rulebook, analysed_at=ANALYSED_AT)
    metrics = result.metrics
    fail_data = failing[0].file_bytes()
    failed = judge(fail_data, "DEMO-LOT-01_fail.csv", rulebook, analysed_at=ANALYSED_AT)
    assert result.verdict.kind.value == "pass" and failed.verdict.kind.value == "fail"
    json_text = to_json(result)
    html = render_html(result)
    failed_html = render_html(failed)
    # the naive reference: today's whole three-page certificate of the passed cell (a passed
    # cell's own certificate is one page now), rendered with nothing shared
    full_html = render_html(result, full=True)
    base_url = TEMPLATES_DIR.as_uri() + "/"

    def plot() -> object:
        return (
            plots.discharge_svg(
                metrics.grading_curve, metrics.plateaus, width_mm=PLOT_WIDTH_MM, height_mm=PLOT_HEIGHT_MM
            ),
            plots.ica_svg(
                metrics.ica_curve, metrics.ica_peaks_v, width_mm=PLOT_WIDTH_MM, height_mm=PLOT_HEIGHT_MM
            ),
        )

    # The ledger on the same disk a station would use, fsync and all.
    ledger = Ledger(tmp / "bench-ledger.sqlite", now=ANALYSED_AT)
    checks = [CheckRowData.from_check(c) for c in result.verdict.checks]
    counter = iter(range(10**9))

    def ledger_cycle() -> None:
        n = next(counter)
        sha = hashlib.sha256(f"input {n}".encode()).hexdigest()
        row, _ = ledger.inputs.claim(
            sha256=sha,
            name=f"cell-{n}.csv",
            size=len(data),
            arrived_at=ANALYSED_AT,
            work_path=f"work/cell-{n}.csv",
        )
        ledger.results.record(
            row.id,
            cell_id=result.cell_id,
            lot=result.lot,
            verdict=result.verdict.kind.value,
            hazards=[],
            result_json=json_text,
            checks=checks,
            rule_set_name=result.rule_set.name,
            rule_set_revision=result.rule_set.revision,
            rule_set_sha256=result.rule_set.sha256,
            analysed_at=ANALYSED_AT,
            json_path=f"results/cell-{n}.json",
            pdf_path=f"certificates/cell-{n}.pdf",
            mails=[],
        )
        ledger.inputs.mark_published(row.id)
        ledger.inputs.mark_final(row.id, "archived", f"archive/cell-{n}.csv", now=ANALYSED_AT)

    import dataclasses

    failed_pdf = tmp / "failed.pdf"
    failed_pdf.write_bytes(render_pdf(failed_html))
    mail_counter = iter(range(10**9))

    def mail_queue() -> None:
        n = next(mail_counter)
        cell = dataclasses.replace(failed, input_sha256=hashlib.sha256(f"mail {n}".encode()).hexdigest())
        letter = failure_letter(cell, str(failed_pdf), ("quality@example.com",), station="bench-line-1")
        build_message(letter, sender="formgate@localhost", date=ANALYSED_AT)
        ledger.outbox.queue(letter, now=ANALYSED_AT)

    # Measure in the state of a station worker: stack imported, stylesheet parsed, start-up
    # objects frozen out of the garbage collector's scans (pipeline.station.worker.init_worker).
    import gc

    import pipeline.report.pdf
    from pipeline.station.worker import prepare_process

    prepare_process()

    print(f"  cheap stages, {mode.cheap_repeats} repeats each, interleaved ...", flush=True)
    cheap = interleave(
        {
            "pandas": lambda: pd.read_csv(io.BytesIO(data), comment="#"),
            "workbook": lambda: read_cycle_file(book_bytes, "bench.xlsx", book_profile),
            "parquet": lambda: read_cycle_file(parquet_bytes, "bench.parquet", parquet_profile),
            "judge path": lambda: judge(data, name, rulebook, analysed_at=ANALYSED_AT),
            "read": lambda: read_cycle_file(data, name, None),
            "vsm": vsm,
            "evaluate": lambda: evaluate(rule_set, cell_type, metrics, result.notes),
            "json": lambda: to_json(result),
            "plot": plot,
            "html": lambda: render_html(result),
            "ledger": ledger_cycle,
            "mail": mail_queue,
        },
        mode.cheap_repeats,
    )
    ledger.close()

    # The worker's own task, with and without its certificate, on a file in a work folder.
    work_file = tmp / name
    work_file.write_bytes(data)
    sha = hashlib.sha256(data).hexdigest()

    fail_file = tmp / "DEMO-LOT-01_fail.csv"
    fail_file.write_bytes(fail_data)
    fail_sha = hashlib.sha256(fail_data).hexdigest()

    def task(certify: str, failing: bool = False) -> Callable[[], object]:
        if failing:
            t = Task(2, str(fail_file), fail_file.name, fail_sha, rulebook, ANALYSED_AT,
                     certify=certify)
        else:
            t = Task(1, str(work_file), name, sha, rulebook, ANALYSED_AT, certify=certify)

        def run() -> object:
            out = run_task(t)
            assert out.error is None and (out.pdf is not None) == (certify == "all"), out.error
            return out

        return run

    # Where the naive render's time goes: layout, then PDF writing, of which font embedding
    # (WeasyPrint's build_fonts_dictionary, wrapped with a timer while the renders run).
    import weasyprint.pdf as wpdf

    original = wpdf.build_fonts_dictionary
    layout, writing, fonts = Timing("layout"), Timing("write"), Timing("fonts")
    split: dict[str, int] = {"on": 0, "pages": 0, "bytes": 0}

    def timed_fonts(*args: Any, **kwargs: Any) -> Any:
        t0 = time.perf_counter()
        try:
            return original(*args, **kwargs)
        finally:
            if split["on"]:
                fonts.values.append(time.perf_counter() - t0)

    def naive_split() -> None:
        split["on"] = 1
        try:
            t0 = time.perf_counter()
            document = weasyprint.HTML(string=full_html, base_url=base_url).render()
            t1 = time.perf_counter()
            pdf = document.write_pdf()
            t2 = time.perf_counter()
        finally:
            split["on"] = 0
        layout.values.append(t1 - t0)
        writing.values.append(t2 - t1)
        split["pages"], split["bytes"] = len(document.pages), len(pdf)

    print(f"  rendering, {mode.repeats} repeats each, interleaved ...", flush=True)
    wpdf.build_fonts_dictionary = timed_fonts
    try:
        renders = interleave(
            {
                "naive": lambda: weasyprint.HTML(string=full_html, base_url=base_url).write_pdf(),
                "task all": task("all"),
                "task none": task("none"),
                "failed task all": task("all", failing=True),
                "failed task none": task("none", failing=True),
                "render": lambda: render_pdf(render_html(result)),
                "render pdf": lambda: render_pdf(html),
                "render failed": lambda: render_pdf(render_html(failed)),
                "naive split": naive_split,
                "fast layout": lambda: pipeline.report.pdf.lay_out(html),
            },
            mode.repeats,
        )
    finally:
        wpdf.build_fonts_dictionary = original
    for t in (layout, writing, fonts):
        del t.values[0]  # the untimed warm-up call
    pages = split["pages"]

    # One document holding several certificates: the font is embedded once for all of them.
    htmls = [
        render_html(judge(r.file_bytes(), f"c{i}.csv", rulebook, analysed_at=ANALYSED_AT))
        for i, r in enumerate((passing + failing)[: mode.batch_certificates])
    ]
    while len(htmls) < mode.batch_certificates:
        htmls.append(html)
    batch = Timing("batch")
    for _ in range(mode.batch_repeats):
        gc.collect()
        t0 = time.perf_counter()
        docs = [weasyprint.HTML(string=h, base_url=base_url).render() for h in htmls]
        docs[0].copy([p for d in docs for p in d.pages]).write_pdf()
        batch.values.append((time.perf_counter() - t0) / len(htmls))

    cert = Timing(
        "cert", [a - b for a, b in zip(renders["task all"].values, renders["task none"].values, strict=True)]
    )
    naive = renders["naive"]
    failed_cert = Timing("failed cert", [
        a - b for a, b in zip(renders["failed task all"].values,
                              renders["failed task none"].values, strict=True)
    ])
    failed_ratio = [a / b for a, b in zip(failed_cert.values, naive.values, strict=True)]
    judge_ratio = [a / b for a, b in zip(cheap["judge path"].values, cheap["pandas"].values, strict=True)]
    cert_ratio = [a / b for a, b in zip(cert.values, naive.values, strict=True)]

    def row(t: Timing, label: str, note: str = "") -> Timing:
        return Timing(label, t.values, note)

    k = mode.batch_certificates
    stages = [
        row(cheap["read"], "read (read_cycle_file)"),
        row(cheap["vsm"], "validate+segment+measure"),
        row(cheap["evaluate"], "judge (evaluate)"),
        row(cheap["judge path"], "judge path (runner.judge, all of the above)"),
        row(cheap["json"], "result JSON (to_json)"),
        row(cheap["plot"], "plot (discharge_svg + ica_svg)"),
        row(cheap["html"], "render: certificate HTML (render_html)", "plots included"),
        row(renders["render pdf"], "render: PDF (pdf.render_pdf)"),
        row(renders["render"], "render (render_html + render_pdf)", f"{pages} pages, passed cell"),
        row(renders["render failed"], "render, failed cell's certificate"),
        row(cert, "passed cell's certificate in a worker", "run_task with, less without; 1 page"),
        row(failed_cert, "failed cell's certificate in a worker", "run_task with, less without"),
        row(cheap["ledger"], "ledger (claim+record+published+final)", "4 commits, fsync"),
        row(cheap["mail"], "mail queue (letter+message+queue_mail)", "failed cell"),
    ]
    references = [
        row(cheap["pandas"], "pandas.read_csv, same bytes"),
        row(cheap["workbook"], "read, workbook of the same record", f".xlsx, {len(book_bytes) / MIB:.1f} MB"),
        row(cheap["parquet"], "read, Parquet file of the same record", f"{len(parquet_bytes) / MIB:.1f} MB"),
        row(naive, "naive WeasyPrint render, full certificate", "3 pages, nothing shared"),
        row(layout, "  naive: layout (HTML.render)"),
        row(renders["fast layout"], "  layout alone, stylesheet and font shared", "pdf.lay_out"),
        row(writing, "  naive: PDF writing (Document.write_pdf)"),
        row(fonts, "    of which font embedding", "subset + embed"),
        row(batch, f"naive: one document of {k} certificates", "per certificate"),
    ]
    return Micro(
        stages,
        references,
        judge_ratio,
        cert_ratio,
        cert,
        naive,
        cheap["judge path"],
        cheap["pandas"],
        pages,
        fonts.median / writing.median if writing.values else math.nan,
        split["bytes"],
        {
            label: ([a / b for a, b in zip(t.values, cheap["pandas"].values, strict=True)], t)
            for label, t in (
                ("workbook read ÷ pandas.read_csv", cheap["workbook"]),
                ("Parquet read ÷ pandas.read_csv", cheap["parquet"]),
            )
        },
        failed_ratio,
        failed_cert,
    )


def measure_import(mode: Mode) -> Timing:
    """Seconds to import the whole stack in a fresh process, as a worker does at start-up."""
    code = (
        "import time; t = time.perf_counter(); "
        "import pipeline.runner, pipeline.report.certificate, pipeline.report.pdf; "
        "print(time.perf_counter() - t)"
    )
    timing = Timing("import of the stack, fresh process", note="runner + certificate + pdf")
    for _ in range(mode.import_repeats):
        out = subprocess.run(
            [sys.executable, "-c", code], cwd=REPO, capture_output=True, text=True, check=True
        )
        timing.values.append(float(out.stdout.strip().splitlines()[-1]))
    return timing


# ---------------------------------------------------------------- a real station


STATION_TOML = """\
[station]
name = "bench-line-1"
workers = {workers}
certify = "{certify}"

[inbox.main]
folder = "inbox"
handover = "rename"

[mail]                     # no [smtp] host: mails are written into mail/ as .eml files
failures_to = ["quality@example.com"]
holds_to = ["quality@example.com"]
digests_to = ["production@example.com"]
alerts_to = ["maintenance@example.com"]
"""


@dataclass(slots=True)
class StationRun:
    workers: int
    certify: str
    files: int
    failed_files: int
    mean_mb: float
    judged_s: float  # start to the last verdict (every input final, its result JSON out)
    sustained: float  # judged cells/s from the first input final to the last
    catch_up_s: float  # last verdict to the last certificate and letter
    peak_worker_mib: float
    pdfs: int
    quarantined: int
    worker_cpu_s: float  # CPU seconds of all workers per cell, first final to all done
    station_cpu_s: float  # CPU seconds of the station's own process per cell, likewise
    last_failure_mail_s: float  # after the first verdict: the last failure letter sent
    first_pass_certificate_s: float  # after the first verdict: the first pass certificate


def _proc_kib(pid: int, key: str) -> float:
    try:
        for line in Path(f"/proc/{pid}/status").read_text().splitlines():
            if line.startswith(key + ":"):
                return float(line.split()[1])
    except OSError:
        pass
    return math.nan


def _cpu_s(pid: int) -> float:
    """User + system CPU seconds of a process so far (0 if it is gone)."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rpartition(")")[2].split()
    except OSError:
        return 0.0
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def _own_cpu_s() -> float:
    t = os.times()
    return t.user + t.system


def _ask(ledger: Path, sql: str) -> Any:
    if not ledger.exists():
        return None
    try:
        with sqlite3.connect(f"file:{ledger}?mode=ro", uri=True, timeout=1.0) as conn:
            return conn.execute(sql).fetchone()[0]
    except sqlite3.Error:
        return None


def _final_count(ledger: Path) -> int:
    return int(_ask(ledger, "SELECT count(*) FROM inputs WHERE final_path IS NOT NULL") or 0)


def _all_done(ledger: Path, n: int, certify: str) -> bool:
    """Every certificate of the burst rendered (the records' and each cell's own) and every
    letter out; with certificates off, every verdict."""
    if certify == "off":
        return True
    waiting = _ask(ledger, "SELECT count(*) FROM certificate_queue WHERE done_at IS NULL")
    pending = _ask(ledger, "SELECT count(*) FROM outbox WHERE state = 'pending'")
    cells = _ask(ledger, "SELECT count(*) FROM published WHERE kind = 'cell result'")
    return waiting == 0 and pending == 0 and (cells or 0) >= n


def _seconds(ledger: Path, sql: str, since: datetime.datetime) -> float:
    text = _ask(ledger, sql)
    if text is None:
        return math.nan
    return (datetime.datetime.fromisoformat(text) - since).total_seconds()


def run_station(tmp: Path, pool: list[tuple[Path, bool]], n: int, workers: int, certify: str) -> StationRun:
    """Pre-fill an inbox with ``n`` files (a burst), start a station, time it until every verdict
    is out, then until every certificate and letter is."""
    from pipeline.station.settings import load_settings, smtp_settings
    from pipeline.station.station import Station

    root = tmp / f"station-{workers}-{certify}"
    root.mkdir()
    shutil.copytree(REPO / "rules", root / "rules")
    text = STATION_TOML.format(workers=workers, certify="all")
    (root / "station.toml").write_text(text, encoding="utf-8")
    settings = load_settings(text, "station.toml", root)
    for folder in settings.all_folders():
        folder.mkdir(parents=True, exist_ok=True)
    inbox = settings.inboxes[0].folder
    chosen = pool[:n]
    for path, _ in chosen:
        os.link(path, inbox / path.name)  # same filesystem: a new name for the same bytes, no copying
    size = sum(p.stat().st_size for p, _ in chosen) / n / 1e6
    station = Station(settings, smtp_settings(settings, {}))
    if certify == "off":
        # certificates off, for this measurement only: the station's loop hands out no render
        # (no setting does this: a failed cell always gets its certificate and its cautions)
        station.render = lambda: None  # type: ignore[method-assign]
    stop = threading.Event()
    errors: list[BaseException] = []

    def target() -> None:
        try:
            station.run(stop)
        except BaseException as exc:  # reported below
            errors.append(exc)

    thread = threading.Thread(target=target, name="bench-station")
    deadline = time.monotonic() + 300.0 + 5.0 * n
    t0 = time.perf_counter()
    thread.start()
    first: tuple[int, float, float] | None = None  # finals, worker CPU, own CPU at the first final

    def worker_cpu() -> float:
        return sum(_cpu_s(pid) for pid in dict(getattr(station.pool, "_processes", {}) or {}))

    def alive() -> None:
        if errors or not thread.is_alive():
            raise RuntimeError(f"the station stopped early: {errors[0] if errors else 'no error'}")
        if time.monotonic() > deadline:
            raise RuntimeError(f"the station did not finish {n} files in time")

    try:
        while (done := _final_count(settings.ledger)) < n:
            if done and first is None:
                first = (done, worker_cpu(), _own_cpu_s())
            alive()
            time.sleep(0.05)
        judged = time.perf_counter() - t0
        while not _all_done(settings.ledger, n, certify):
            alive()
            time.sleep(0.05)
        all_done = time.perf_counter() - t0
        pool_procs = dict(getattr(station.pool, "_processes", {}) or {})
        peak_kib = max((_proc_kib(pid, "VmHWM") for pid in pool_procs), default=math.nan)
        first = first or (0, 0.0, 0.0)
        cells = max(1, n - first[0])
        worker_cpu_s = (worker_cpu() - first[1]) / cells
        station_cpu_s = (_own_cpu_s() - first[2]) / cells
    finally:
        stop.set()
        thread.join(300)
    with sqlite3.connect(f"file:{settings.ledger}?mode=ro", uri=True) as conn:
        finals = sorted(
            datetime.datetime.fromisoformat(r[0])
            for r in conn.execute("SELECT final_at FROM inputs WHERE final_path IS NOT NULL")
        )
        quarantined = conn.execute("SELECT count(*) FROM inputs WHERE state = 'quarantined'").fetchone()[0]
    span = (finals[-1] - finals[0]).total_seconds()
    last_mail = _seconds(settings.ledger, "SELECT max(sent_at) FROM outbox WHERE kind = 'failure'", finals[0])
    first_pass = _seconds(
        settings.ledger,
        "SELECT min(q.done_at) FROM certificate_queue q JOIN results r ON r.id = q.result_id "
        "WHERE r.verdict = 'pass'",
        finals[0],
    )
    pdfs = sum(1 for _ in settings.certificates.rglob("*.pdf"))
    shutil.rmtree(root, ignore_errors=True)
    return StationRun(
        workers,
        certify,
        n,
        sum(1 for _, f in chosen if f),
        size,
        judged,
        (n - 1) / span if span > 0 else math.nan,
        all_done - judged,
        peak_kib / 1024,
        pdfs,
        quarantined,
        worker_cpu_s,
        station_cpu_s,
        last_mail,
        first_pass,
    )


# ---------------------------------------------------------------- memory of a long-lived worker


def rss_child(spec_path: str) -> None:
    """Runs in a fresh process: be a worker for many cells, report RSS as it goes (JSON on stdout)."""
    spec = json.loads(Path(spec_path).read_text())
    t0 = time.perf_counter()
    from pipeline.station.worker import Task, init_worker, run_task

    init_worker()

    import_s = time.perf_counter() - t0
    from pipeline.rulebook.book import load_rules_dir

    rulebook = load_rules_dir(REPO / "rules")
    rss_after_import = _proc_kib(os.getpid(), "VmRSS") / 1024
    files = spec["files"]
    samples: list[tuple[int, float]] = []
    first_peak = math.nan
    for i in range(spec["cells"]):
        path, sha = files[i % len(files)]
        certify = "all" if i % spec["render_every"] == 0 else "none"
        out = run_task(Task(i + 1, path, Path(path).name, sha, rulebook, ANALYSED_AT, certify=certify))
        if out.error is not None:
            raise SystemExit(out.error)
        if i == 0:
            first_peak = _proc_kib(os.getpid(), "VmHWM") / 1024
        if (i + 1) % 100 == 0:
            samples.append((i + 1, _proc_kib(os.getpid(), "VmRSS") / 1024))
    print(
        json.dumps(
            {
                "import_s": import_s,
                "rss_after_import": rss_after_import,
                "first_cell_peak": first_peak,
                "samples": samples,
                "peak": _proc_kib(os.getpid(), "VmHWM") / 1024,
            }
        )
    )


def measure_rss(mode: Mode, tmp: Path, pool: list[tuple[Path, bool]]) -> dict[str, Any]:
    files = [(str(p), hashlib.sha256(p.read_bytes()).hexdigest()) for p, _ in pool[: FAIL_EVERY * 2]]
    spec = tmp / "rss.json"
    spec.write_text(
        json.dumps({"files": files, "cells": mode.rss_cells, "render_every": mode.rss_render_every})
    )
    out = subprocess.run(
        [sys.executable, str(Path(__file__).resolve()), "--rss-child", str(spec)],
        cwd=REPO,
        capture_output=True,
        text=True,
        check=False,
    )
    if out.returncode != 0:
        raise RuntimeError(f"the memory run failed:\n{out.stderr[-2000:]}")
    return dict(json.loads(out.stdout.strip().splitlines()[-1]))


# ---------------------------------------------------------------- command start times

# A command starts in a fresh process every time, and pays for every module it imports.
# Targets: a one-file `formgate check --no-pdf` from start to exit in at most this fraction
# of what it took before the command line imported only what it uses, and `formgate status`
# importing its modules in at most TARGET_STATUS_IMPORT_S. "Before" is the code of commit
# BEFORE_CHECK_COMMIT, taken out of the repository's history (git archive) into the
# benchmark's folder and run from there with the same interpreter and libraries, taking turns
# with today's code in the same run. Where that cannot be done (no git, no history, or the
# old code no longer runs with today's libraries), the figure it was measured at before,
# BEFORE_CHECK_START_S (the median of 15 runs of that check of the same invented file on the
# benchmark's machine, at a load average of about 1), stands in for it, and the table says so.
BEFORE_CHECK_COMMIT = "492d5e0"
BEFORE_CHECK_START_S = 0.99
TARGET_CHECK_START_FRACTION = 0.4
TARGET_STATUS_IMPORT_S = 0.3
STATUS_CELLS = 3  # cells the station of the status rows has judged, the last one failed
# the reference: a fresh process that reads the same file with pandas and nothing else
READ_WITH_PANDAS = "import sys, pandas; pandas.read_csv(sys.argv[1], comment='#')"

# Run in a fresh process: `formgate ARGS` (argv[2:]) through the same main as the formgate
# script, then the names of the loaded modules into the file argv[1].
_LIST_MODULES = """\
import json, sys
from pipeline.cli.main import main
try:
    code = main(sys.argv[2:])
except SystemExit as exc:
    code = exc.code
with open(sys.argv[1], "w", encoding="utf-8") as fh:
    json.dump(sorted(sys.modules), fh)
sys.exit(code)
"""


@dataclass(slots=True)
class CommandStarts:
    """Start-to-exit and import times of commands, each repeat in a fresh process."""

    rows: list[Timing]
    references: list[Timing]
    check: Timing  # formgate check --no-pdf, start to exit
    status_imports: Timing
    pandas_read: Timing  # a fresh process reading the same file with pandas.read_csv
    # the same check by the code of BEFORE_CHECK_COMMIT, taking turns with today's (None when
    # that code could not be taken out of the history or did not run)
    before: Timing | None = None


def formgate_command() -> list[str]:
    """The installed formgate script, else ``python -m pipeline`` (the same main either way)."""
    script = Path(sys.executable).with_name("formgate")
    return [str(script)] if script.exists() else [sys.executable, "-m", "pipeline"]


def status_station(tmp: Path, passing: list[Record], failing: list[Record]) -> Path:
    """A station folder whose station has judged STATUS_CELLS cells, one failed (it waits for a
    person), and stopped: what `formgate status` reads. Run as `formgate watch` runs it."""
    from pipeline.station.settings import load_settings, smtp_settings
    from pipeline.station.station import Station

    root = tmp / "status-station"
    root.mkdir()
    shutil.copytree(REPO / "rules", root / "rules")
    text = STATION_TOML.format(workers=1, certify="failed_and_held")
    (root / "station.toml").write_text(text, encoding="utf-8")
    settings = load_settings(text, "station.toml", root)
    for folder in settings.all_folders():
        folder.mkdir(parents=True, exist_ok=True)
    records = [*passing[: STATUS_CELLS - 1], failing[0]]
    for n, record in enumerate(records):
        data = record.file_bytes(f"S{n:05d}", "BENCH-STATUS-LOT")
        (settings.inboxes[0].folder / f"S{n:05d}.csv").write_bytes(data)
    station = Station(settings, smtp_settings(settings, {}))
    stop = threading.Event()
    thread = threading.Thread(target=station.run, args=(stop,), name="bench-status-station")
    thread.start()
    try:
        deadline = time.monotonic() + 300.0
        while _final_count(settings.ledger) < len(records):
            if not thread.is_alive() or time.monotonic() > deadline:
                raise RuntimeError("the station for the status rows did not judge its cells")
            time.sleep(0.05)
    finally:
        stop.set()
        thread.join(300)
    return root


def compile_bytecode(package: Path) -> None:
    """Write the bytecode of ``package`` beside its sources, as an installation does (pip
    compiles every module it installs) and as a first run does unless the environment forbids
    it (``PYTHONDONTWRITEBYTECODE``, which some shells set): a fresh process then loads its
    modules instead of compiling them from source every time (numpy, pandas and the rest come
    compiled with their packages). The files are Python's own cache (``__pycache__``, ignored
    by git); a module changed later is compiled from its source again, as Python always does."""
    env = {key: value for key, value in os.environ.items() if key != "PYTHONDONTWRITEBYTECODE"}
    subprocess.run(
        [sys.executable, "-m", "compileall", "-q", str(package)], env=env, capture_output=True, check=False
    )


def before_code(tmp: Path, cell: Path) -> tuple[list[str], Path] | None:
    """``python -m pipeline check --no-pdf`` of the code of BEFORE_CHECK_COMMIT, and the folder
    it runs in, taken out of the repository's history; None when it cannot be had or fails."""
    import io
    import tarfile

    folder = tmp / f"before-{BEFORE_CHECK_COMMIT}"
    try:
        archive = subprocess.run(
            ["git", "-C", str(REPO), "archive", BEFORE_CHECK_COMMIT, "pipeline", "rules"],
            capture_output=True, check=True,
        ).stdout
        folder.mkdir()
        with tarfile.open(fileobj=io.BytesIO(archive)) as tar:
            tar.extractall(folder, filter="data")
    except (OSError, subprocess.CalledProcessError, tarfile.TarError):
        return None
    compile_bytecode(folder / "pipeline")  # as today's code (main)
    argv = [sys.executable, "-m", "pipeline", "check", "--no-pdf", "--rules", str(folder / "rules"),
            str(cell)]
    done = subprocess.run(
        argv, cwd=folder, env=_before_env(folder), capture_output=True, text=True, check=False
    )
    return (argv, folder) if done.returncode == 0 and " pass " in done.stdout else None


def _before_env(folder: Path) -> dict[str, str]:
    """The environment of the old code's runs: its own package first on the path."""
    return {**os.environ, "PYTHONPATH": str(folder)}


def loaded_pipeline_modules(argv: list[str], tmp: Path) -> list[str]:
    """The pipeline modules `formgate argv` loads, from one run in a fresh process."""
    listing = tmp / "loaded-modules.json"
    subprocess.run(
        [sys.executable, "-c", _LIST_MODULES, str(listing), *argv], cwd=tmp, capture_output=True, check=True
    )
    modules = json.loads(listing.read_text(encoding="utf-8"))
    return [m for m in modules if m == "pipeline" or m.startswith("pipeline.")]


def measure_commands(mode: Mode, tmp: Path, passing: list[Record], failing: list[Record]) -> CommandStarts:
    """Each command from start to exit, and the imports of two, in fresh processes, interleaved.

    Every repeat runs each command once, in reversed order every other round, after one
    untimed round (the files and modules in the page cache, as for a command typed twice).
    "imports" imports, in a fresh process, the pipeline modules the command loaded when it
    ran (they import the rest) as the command imports them, timed inside that process.
    """
    repeats = {"smoke": 1, "quick": 3}.get(mode.name, 9)
    cell = tmp / "start-cell.csv"
    cell.write_bytes(passing[0].file_bytes())
    out = tmp / "start-out"
    station = status_station(tmp, passing, failing)
    formgate = formgate_command()
    rules = str(REPO / "rules")
    check = ["check", "--no-pdf", "--rules", rules, str(cell)]
    status = ["status", str(station)]

    def started(argv: list[str], cwd: Path = tmp, env: dict[str, str] | None = None) -> Callable[[], float]:
        def run() -> float:
            t0 = time.perf_counter()
            subprocess.run(argv, cwd=cwd, env=env, capture_output=True, check=False)
            return time.perf_counter() - t0

        return run

    def imports(modules: list[str]) -> Callable[[], float]:
        # as the command imports them: with the garbage collector paused (pipeline.cli.starting)
        code = "\n".join(
            [
                "import time",
                "t = time.perf_counter()",
                "from pipeline.cli import starting",
                "starting.as_program()",
                "with starting.importing():",
                *(f"    import {m}" for m in modules),
                "print(time.perf_counter() - t)",
            ]
        )

        def run() -> float:
            done = subprocess.run(
                [sys.executable, "-c", code], cwd=tmp, capture_output=True, text=True, check=True
            )
            return float(done.stdout.strip().splitlines()[-1])

        return run

    # every command once, checked: a command that fails would time its error message
    for argv in (check, ["check", "--rules", rules, "--out", str(out), str(cell)], status):
        done = subprocess.run([*formgate, *argv], cwd=tmp, capture_output=True, text=True, check=False)
        if done.returncode != 0:
            raise RuntimeError(f"formgate {argv[0]} failed:\n{done.stderr[-2000:]}")
    things: dict[str, Callable[[], float]] = {
        "python": started([sys.executable, "-c", "pass"]),
        "pandas": started([sys.executable, "-c", READ_WITH_PANDAS, str(cell)]),
        "help": started([*formgate, "--help"]),
        "check": started([*formgate, *check]),
        "check imports": imports(loaded_pipeline_modules(check, tmp)),
        "certificate": started([*formgate, "check", "--rules", rules, "--out", str(out), str(cell)]),
        "status": started([*formgate, *status]),
        "status imports": imports(loaded_pipeline_modules(status, tmp)),
    }
    before = before_code(tmp, cell)
    if before is not None:
        things["before"] = started(before[0], before[1], _before_env(before[1]))
    for fn in things.values():
        fn()
    values: dict[str, list[float]] = {name: [] for name in things}
    names = list(things)
    for r in range(repeats):
        for name in names if r % 2 == 0 else reversed(names):
            values[name].append(things[name]())

    def row(name: str, label: str, note: str = "") -> Timing:
        return Timing(label, values[name], note)

    check_row = row("check", "formgate check --no-pdf, start to exit", "one file, results not written")
    status_imports = row("status imports", "formgate status, imports", "the modules it loads")
    pandas_row = row("pandas", "pandas.read_csv of the same file, fresh process", "python -c")
    before_row = None
    if before is not None:
        before_row = row("before", f"formgate check --no-pdf, code of {BEFORE_CHECK_COMMIT}",
                         "the same check, code before (python -m)")
    return CommandStarts(
        [
            row("help", "formgate --help, start to exit"),
            check_row,
            row("check imports", "formgate check --no-pdf, imports", "the modules it loads"),
            row("certificate", "formgate check, start to exit", "one file, result and certificate"),
            row("status", "formgate status, start to exit", f"{STATUS_CELLS} cells, 1 waiting for a person"),
            status_imports,
        ],
        [row("python", "python -c pass, start to exit"), pandas_row, *([before_row] if before_row else [])],
        check_row,
        status_imports,
        pandas_row,
        before_row,
    )


def command_lines(starts: CommandStarts) -> list[str]:
    """The table's part for command start times, and the two targets."""
    lines = ["command start (a fresh process each repeat, commands taking turns)"]
    timings = starts.rows + starts.references
    w = max(len(t.label) for t in timings) + 2
    quartiles, extremes = f"p25{DASH}p75", f"min{DASH}max"
    lines.append(f"{'command':<{w}}{'median':>10}  {quartiles:<19}{extremes:<19}{'n':>3}  note")
    for t in timings:
        if t is starts.references[0]:
            lines.append("reference")
        q1, q3 = t.quartiles()
        lines.append(
            f"{t.label:<{w}}{fmt_s(t.median):>10}  {fmt_range(q1, q3):<19}"
            f"{fmt_range(min(t.values), max(t.values)):<19}{len(t.values):>3}  {t.note}".rstrip()
        )
    ratios = [a / b for a, b in zip(starts.check.values, starts.pandas_read.values, strict=True)]
    lines.append(
        f"check --no-pdf ÷ pandas.read_csv of the file, fresh process: median "
        f"{statistics.median(ratios):.2f}, {min(ratios):.2f}{DASH}{max(ratios):.2f} "
        "(no target: what the command adds to reading the file)"
    )
    check_s, status_s = starts.check.median, starts.status_imports.median
    if starts.before is not None:
        before = [a / b for a, b in zip(starts.check.values, starts.before.values, strict=True)]
        fraction = statistics.median(before)
        lines.append(
            f"formgate check --no-pdf ÷ the same check at commit {BEFORE_CHECK_COMMIT}, taking turns: "
            f"median {fraction:.2f}, {min(before):.2f}{DASH}{max(before):.2f}   "
            f"target ≤ {TARGET_CHECK_START_FRACTION:.2f}   {verdict(fraction <= TARGET_CHECK_START_FRACTION)}"
        )
    else:
        fraction = check_s / BEFORE_CHECK_START_S
        lines.append(
            f"formgate check --no-pdf, start to exit: {fmt_s(check_s)}, {fraction:.2f} of the "
            f"{BEFORE_CHECK_START_S:.2f} s measured before (the code of commit {BEFORE_CHECK_COMMIT} "
            f"could not be run here)   target ≤ {TARGET_CHECK_START_FRACTION:.2f} of it   "
            f"{verdict(fraction <= TARGET_CHECK_START_FRACTION)}"
        )
    lines.append(
        f"formgate status, imports: {fmt_s(status_s)}   target ≤ {fmt_s(TARGET_STATUS_IMPORT_S)}   "
        f"{verdict(status_s <= TARGET_STATUS_IMPORT_S)}"
    )
    return lines


# ---------------------------------------------------------------- the machine and the table


def machine() -> list[tuple[str, str]]:
    import importlib.metadata as md

    cpu = "unknown"
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    try:
        mem = next(
            line.split()[1]
            for line in Path("/proc/meminfo").read_text().splitlines()
            if line.startswith("MemTotal")
        )
        memory = f"{int(mem) / 2**20:.1f} GiB"
    except (OSError, StopIteration):
        memory = "unknown"
    usable = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count()
    versions = []
    for dist in (
        "numpy",
        "scipy",
        "pandas",
        "weasyprint",
        "pydyf",
        "fonttools",
        "jinja2",
        "watchdog",
        "python-calamine",
        "pyarrow",
    ):
        with contextlib.suppress(md.PackageNotFoundError):
            versions.append(f"{dist} {md.version(dist)}")
    try:
        from weasyprint.text.ffi import harfbuzz_subset  # type: ignore[attr-defined]

        subsetter = "HarfBuzz" if harfbuzz_subset else "fontTools (libharfbuzz-subset not found)"
    except ImportError:
        subsetter = "fontTools (libharfbuzz-subset not found)"
    try:
        commit = subprocess.run(
            ["git", "rev-parse", "--short", "HEAD"], cwd=REPO, capture_output=True, text=True, check=True
        ).stdout.strip()
        changed = subprocess.run(
            ["git", "status", "--porcelain", "--", "pipeline", "templates", "rules"],
            cwd=REPO,
            capture_output=True,
            text=True,
            check=True,
        ).stdout.strip()
        if changed:
            commit += " with uncommitted changes in pipeline/, templates/ or rules/"
    except (OSError, subprocess.CalledProcessError):
        commit = "unknown"
    return [
        ("CPU", cpu),
        ("cores", f"{os.cpu_count()} ({usable} usable by this process)"),
        ("memory", memory),
        ("system", f"{platform.system()} {platform.release()}"),
        ("Python", platform.python_version()),
        ("libraries", ", ".join(versions)),
        ("font subsetting", subsetter),
        ("formgate", f"commit {commit}"),
    ]


def verdict(ok: bool) -> str:
    return "meets" if ok else "misses"


def build_table(
    mode: Mode,
    info: list[tuple[str, str]],
    load: tuple[str, str],
    inputs: str,
    micro: Micro | None,
    import_t: Timing | None,
    stations: list[StationRun],
    rss: dict[str, Any] | None,
    started: datetime.datetime,
    took_s: float,
    commands: CommandStarts | None = None,
) -> str:
    lines: list[str] = []
    add = lines.append
    add(f"formgate benchmark, {mode.name} run, {started:%Y-%m-%d %H:%M} UTC, took {took_s / 60:.1f} min")
    for key, value in info:
        add(f"{key + ':':<17}{value}")
    add(f"{'load average:':<17}{load[0]} at start, {load[1]} at end (1, 5, 15 min)")
    add(f"{'input:':<17}{inputs}")
    add("")
    timings = ([*micro.stages, *micro.references] if micro else []) + ([import_t] if import_t else [])
    if timings:
        w = max(len(t.label) for t in timings) + 2
        quartiles, extremes = f"p25{DASH}p75", f"min{DASH}max"
        add(f"{'stage':<{w}}{'median':>10}  {quartiles:<19}{extremes:<19}{'n':>3}  note")
        for t in timings:
            if micro and t is micro.references[0]:
                add("reference")
            q1, q3 = t.quartiles()
            add(
                f"{t.label:<{w}}{fmt_s(t.median):>10}  {fmt_range(q1, q3):<19}"
                f"{fmt_range(min(t.values), max(t.values)):<19}{len(t.values):>3}  {t.note}".rstrip()
            )
        add("")
    if micro:
        add(f"ratio (measured side by side in this run)   median   min{DASH}max      of minima   target")
        jr, cr = statistics.median(micro.judge_ratio), statistics.median(micro.cert_ratio)
        jm = min(micro.judge_path.values) / min(micro.pandas.values)
        cm = min(micro.cert_per_cell.values) / min(micro.naive.values)
        for label, ratio, values, of_minima, goal in (
            ("judge path ÷ pandas.read_csv, same bytes", jr, micro.judge_ratio, jm, TARGET_JUDGE_RATIO),
            ("passed cell's certificate ÷ naive render", cr, micro.cert_ratio, cm, TARGET_CERT_RATIO),
            *(
                [("failed cell's certificate ÷ naive render", statistics.median(micro.failed_ratio),
                  micro.failed_ratio,
                  min(micro.failed_cert.values) / min(micro.naive.values), TARGET_FAILED_CERT_RATIO)]
                if micro.failed_ratio and micro.failed_cert is not None else []
            ),
        ):
            spread = f"{min(values):.2f}{DASH}{max(values):.2f}"
            ok = verdict(ratio <= goal)
            add(f"{label:<43}{ratio:6.2f}   {spread:<12}{of_minima:>7.2f}     ≤ {goal:.2f}   {ok}")
        for label, (values, reader) in micro.layout_ratios.items():
            spread = f"{min(values):.2f}{DASH}{max(values):.2f}"
            of_minima = min(reader.values) / min(micro.pandas.values)
            add(f"{label:<43}{statistics.median(values):6.2f}   {spread:<12}{of_minima:>7.2f}     (none)")
        add(
            f"(font embedding is {micro.font_share:.0%} of the naive render's PDF writing; "
            f"the certificate has {micro.pages} pages, {micro.pdf_bytes / 1024:.0f} KiB)"
        )
        add("")
    if stations:
        add("station throughput (real station, a burst of files in the inbox at once, mail to .eml files)")
        add(
            f"{'workers':<8}{'certificates':<13}{'files':>6}{'failed':>7}{'MB/file':>8}{'PDFs':>6}"
            f"{'verdicts':>9}{'judged/s':>9}{'catch-up':>9}{'CPU/cell':>15}{'peak RSS/worker':>17}"
        )
        for s in stations:
            warn = f"  ({s.quarantined} quarantined!)" if s.quarantined else ""
            add(
                f"{s.workers:<8}{'on' if s.certify == 'all' else 'off':<13}{s.files:>6}{s.failed_files:>7}"
                f"{s.mean_mb:>8.2f}{s.pdfs:>6}{s.judged_s:>8.1f}s{s.sustained:>9.2f}{s.catch_up_s:>8.1f}s"
                f"{s.worker_cpu_s * 1000:>8.0f} +{s.station_cpu_s * 1000:>3.0f} ms"
                f"{s.peak_worker_mib:>13.0f} MiB{warn}".rstrip()
            )
        add(
            "verdicts = start to the last input final (its result JSON out); judged/s = from the first "
            "input final to the last;"
        )
        add(
            "catch-up = the last verdict to the last certificate (each record's and each cell's own) "
            "and letter;"
        )
        add(
            "CPU/cell = CPU time of the workers + of the station's own process per cell, from the first "
            "input final to all done"
        )
        on = [s for s in stations if s.workers == 2 and s.certify == "all"]
        off = [s for s in stations if s.workers == 2 and s.certify == "off"]
        if on and off:
            ratio = on[0].sustained / off[0].sustained
            add(
                f"judged cells/s, certificates on ÷ certificates off (2 workers): {ratio:.2f}   "
                f"target ≥ {TARGET_ON_OFF:.2f}   {verdict(ratio >= TARGET_ON_OFF)}"
            )
            r = on[0]
            first = r.last_failure_mail_s <= r.first_pass_certificate_s
            add(
                f"the burst's failure letters: the last sent {r.last_failure_mail_s:.1f} s after the "
                f"first verdict, the first pass certificate rendered at {r.first_pass_certificate_s:.1f} s"
                f"   target: every failure letter first   {verdict(first)}"
            )
            add(
                f"queue catch-up after a {r.files}-file burst: {r.catch_up_s:.1f} s after the last "
                f"verdict ({r.files / max(r.judged_s + r.catch_up_s, 1e-9):.2f} certified cells/s overall)"
            )
        add("")
    if stations or rss:
        add("memory")
        peaks = [s.peak_worker_mib for s in stations if not math.isnan(s.peak_worker_mib)]
        if rss:
            peaks.append(rss["peak"])
        if peaks:
            top = max(peaks)
            add(
                f"peak RSS per worker (station workers and the long-lived one): {top:.0f} MiB   "
                f"target ≤ {TARGET_PEAK_MIB:.0f} MiB   {verdict(top <= TARGET_PEAK_MIB)}"
            )
        if rss:
            samples = rss["samples"]
            first, last = samples[0][1], samples[-1][1]
            growth = (last - first) / first
            add(
                f"fresh worker: import {rss['import_s']:.2f} s, "
                f"RSS {rss['rss_after_import']:.0f} MiB after import, "
                f"peak {rss['first_cell_peak']:.0f} MiB after judging and certifying one cell"
            )
            add(
                f"RSS over {samples[-1][0]:,} cells in one worker (judged all, certificate every "
                f"{mode.rss_render_every}th): " + ", ".join(f"{v:.0f}" for _, v in samples) + " MiB"
            )
            renders = (samples[-1][0] - samples[0][0]) / mode.rss_render_every
            add(
                f"  growth from cell {samples[0][0]} to cell {samples[-1][0]:,}: {last - first:+.1f} MiB, "
                f"that is {(last - first) * 1024 / renders:+.0f} KiB per certificate rendered in between "
                f"({growth:+.1%})   target flat (≤ {FLAT_GROWTH:.0%})   {verdict(growth <= FLAT_GROWTH)}"
                + ("" if samples[-1][0] >= 1000 else "   (short run: not the 1,000 cells asked for)")
            )
    if commands:
        add("")
        lines.extend(command_lines(commands))
    return "\n".join(lines).rstrip() + "\n"


def write_doc(table: str) -> None:
    block = f"{BEGIN}\n\n```text\n{table}```\n\n{END}"
    text = (
        DOC.read_text(encoding="utf-8")
        if DOC.exists()
        else (
            "# Performance\n\nThe latest `make bench` table; benchmarks/README.md says what each row "
            "means.\n\n"
            f"{BEGIN}\n{END}\n"
        )
    )
    if BEGIN not in text or END not in text:
        text = text.rstrip() + "\n\n" + BEGIN + "\n" + END + "\n"
    head, rest = text.split(BEGIN, 1)
    _, tail = rest.split(END, 1)
    DOC.write_text(head + block + tail, encoding="utf-8")


def profile(what: str, passing: list[Record]) -> None:
    """Print where one judge path or one certificate render spends its time (cProfile)."""
    import cProfile
    import pstats

    from pipeline.report.certificate import render_html
    from pipeline.report.pdf import render_pdf
    from pipeline.rulebook.book import load_rules_dir
    from pipeline.runner import judge

    rulebook = load_rules_dir(REPO / "rules")
    data = passing[0].file_bytes()
    result = judge(data, "cell.csv", rulebook, analysed_at=ANALYSED_AT)
    html = render_html(result)
    render_pdf(html)  # warm, as a worker is
    profiler = cProfile.Profile()
    profiler.enable()
    if what == "judge":
        judge(data, "cell.csv", rulebook, analysed_at=ANALYSED_AT)
    else:
        render_pdf(render_html(result))
    profiler.disable()
    pstats.Stats(profiler).sort_stats("cumulative").print_stats(40)


# ---------------------------------------------------------------- main


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        description=__doc__.splitlines()[0], epilog="example: .venv/bin/python benchmarks/run.py --quick"
    )
    parser.add_argument(
        "--quick", action="store_true", help="short run, fewer repeats; not written to the docs"
    )
    parser.add_argument(
        "--smoke", action="store_true", help="the smallest run, to check that it works; prints only"
    )
    parser.add_argument(
        "--write", action="store_true", help="write the table to docs/performance.md even when quick"
    )
    parser.add_argument("--no-write", action="store_true", help="print the table only")
    parser.add_argument(
        "--skip", default="", help="comma-separated parts to leave out: stages,import,commands,station,rss"
    )
    parser.add_argument(
        "--profile",
        choices=("judge", "render"),
        help="print a cProfile of one judge path or one certificate render, and stop",
    )
    parser.add_argument("--rss-child", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.rss_child:
        rss_child(args.rss_child)
        return 0
    import logging

    # The renderer warns on every document that it falls back to fontTools; once is enough.
    logging.getLogger("weasyprint").setLevel(logging.ERROR)
    mode = SMOKE if args.smoke else QUICK if args.quick else FULL
    skip = {s.strip() for s in args.skip.split(",") if s.strip()}
    started = datetime.datetime.now(datetime.UTC)
    t_start = time.perf_counter()
    load_start = ", ".join(f"{v:.2f}" for v in os.getloadavg())
    info = machine()
    with tempfile.TemporaryDirectory(prefix="formgate-bench-") as tmp_name:
        tmp = Path(tmp_name)
        print(f"{'profile' if args.profile else mode.name} run: inventing cycle files ...", flush=True)
        passing, failing = make_records(QUICK if args.profile else mode)
        if args.profile:
            profile(args.profile, passing)
            return 0
        compile_bytecode(REPO / "pipeline")
        first = passing[0]
        inputs = (
            f"invented DEMO-LFP-20A cells, {first.rows:,} rows ({first.hours:.1f} h at 1 Hz), "
            f"{len(first.file_bytes()) / 1e6:.2f} MB CSV each"
        )
        micro = None if "stages" in skip else measure_stages(mode, passing, failing, tmp)
        print("  import of the stack ...", flush=True)
        import_t = None if "import" in skip else measure_import(mode)
        print("  command start times ...", flush=True)
        commands = None if "commands" in skip else measure_commands(mode, tmp, passing, failing)

        # A burst of mode.burst_files files, judged with certificates off, then on: side by side.
        pool = Pool(tmp / "pool", passing, failing)
        stations: list[StationRun] = []
        for certify in [] if "station" in skip else ["off", "all"]:
            n = mode.burst_files
            pool.ensure(n)
            print(f"  station: 2 workers, certificates {'off' if certify == 'off' else 'on'}, "
                  f"a burst of {n} files ...", flush=True)
            stations.append(run_station(tmp, pool.entries, n, 2, certify))
        rss = None
        if "rss" not in skip:
            print(f"  one worker over {mode.rss_cells} cells ...", flush=True)
            rss = measure_rss(mode, tmp, pool.entries)
    load_end = ", ".join(f"{v:.2f}" for v in os.getloadavg())
    table = build_table(
        mode,
        info,
        (load_start, load_end),
        inputs,
        micro,
        import_t,
        stations,
        rss,
        started,
        time.perf_counter() - t_start,
        commands,
    )
    print()
    print(table, end="")
    if not args.no_write and (mode is FULL or args.write) and not skip and mode is not SMOKE:
        write_doc(table)
        print(f"\nwritten to {DOC.relative_to(REPO)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
