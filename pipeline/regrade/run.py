"""A regrade of a station: choose its inputs, judge them again on Dask, list what changes, apply it.

Edge module (ledger, files, the Dask engine). The steps:

1. the inputs the selection takes (archive.py), with the time each was first analysed, so
   a record keeps its place in its cell's history whatever the regrade's own time;
2. each judged again under the rules bundle (grid.py, on a LocalCluster or a scheduler;
   judgements kept in ``<station>/regrades/judged.sqlite`` so that a stopped run resumes);
3. every touched lot's cells decided again with the new judgements (changes.py, pure);
4. the change report, CSV and PDF (report/regradereport.py), in ``<station>/regrades/``
   or ``--out``;
5. with ``apply``: the regrade recorded (ledger/regrades.py) and, per changed cell in ONE
   short transaction, its inputs' new results (each with its JSON and certificate of its own,
   ``<cell>~regrade-<N>~<file>.json`` / ``.pdf``, beside the old ones) and its new decision,
   cause 'regrade'; each changed cell's certificate and cell JSON published anew (the old
   certificate kept under ``<cell>~cell.before-regrade-<N>.pdf``); a closed lot's report written again; a cell
   whose decision rests on a person's review is listed for a new review and left alone.
   Applying needs the station's own rules (a station decides its cells by the rules in its
   folder: a change recorded under other rules would be undone by the next file).
"""

from __future__ import annotations

import datetime
import hashlib
import json
import logging
import os
import shutil
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from pipeline.errors import FormgateError
from pipeline.ledger.ledger import Ledger
from pipeline.ledger.regrades import Rejudged
from pipeline.ledger.rows import CheckRowData, DecisionRow, ResultRow
from pipeline.names import cell_file_stem, safe_name
from pipeline.regrade.archive import Archived, Selection, select_inputs
from pipeline.regrade.changes import CellChange, LotChanges, Standing, lot_changes
from pipeline.regrade.grid import judge_many
from pipeline.regrade.items import Judged, RegradeItem, RunStats
from pipeline.regrade.rules_bundle import Rules
from pipeline.report.regradereport import (
    ChangedCell,
    CheckLine,
    RegradeReportInput,
    counts,
    regrade_csv,
    render_regrade_pdf,
)
from pipeline.report.result import accuracy_of
from pipeline.rulebook.book import reused_revisions
from pipeline.station.published_files import Written, note_written
from pipeline.station.settings import Settings
from pipeline.writing import write_atomic

log = logging.getLogger("formgate.regrade")


@dataclass(frozen=True, slots=True)
class Engine:
    """How the inputs are judged: on which cluster, and how their bytes reach it."""

    scheduler: str | None = None
    workers: int | None = None
    ship_bytes: bool = False
    batch_files: int | None = None
    progress: bool = True


@dataclass(frozen=True, slots=True)
class Outcome:
    """What a regrade found (and, applied, recorded)."""

    lots: tuple[LotChanges, ...]
    inputs: int
    report_pdf: Path
    report_csv: Path
    regrade_id: int | None
    applied: int  # cells that carry the regrade's decision (a resumed run's included)
    stats: RunStats = field(default_factory=RunStats)
    counts: tuple[tuple[str, int], ...] = ()  # (change, cells), as the report counts them
    resumed: int = 0  # of the cells applied, those a run cut short had recorded already
    # closed lots the selection took in part, taken whole: (lot, inputs selected, inputs)
    widened: tuple[tuple[str, int, int], ...] = ()

    @property
    def changes(self) -> tuple[CellChange, ...]:
        return tuple(c for lot in self.lots for c in lot.changes)


Judge = Callable[[Sequence[RegradeItem]], Iterator[Judged]]


def regrades_folder(settings: Settings) -> Path:
    return settings.ledger.parent / "regrades"


def regrade_station(
    settings: Settings,
    ledger: Ledger,
    rules: Rules,
    selection: Selection,
    *,
    engine: Engine,
    now: datetime.datetime,
    apply: bool = False,
    run_by: str = "",
    reason: str = "",
    out: Path | None = None,
    mail: bool = False,
) -> Outcome:
    """Regrade the station's selected inputs under ``rules``; apply the changes if asked."""
    if apply:
        own = Rules.read(settings.rules_dir)
        if own.digest != rules.digest:
            raise FormgateError(
                f"--apply needs the station's own rules ({settings.rules_dir}); "
                f"{rules.folder} differs from them",
                None,
                "Run a dry run with these rules to see what they change; to apply them, put "
                "them in the station's rules folder first (the station judges new files by "
                "them too), then regrade with --apply.",
            )
        reused = reused_revisions(rules.rulebook().rule_sets, ledger.results.rule_sets())
        if reused:
            raise reused[0]
        if not run_by.strip() or not reason.strip():
            raise FormgateError("--apply needs --by NAME and --reason TEXT", None,
                                "Say who applies the regrade and why: the ledger keeps both.")
    # a regrade cut short carries on: what it chose, judged and changed is taken as it was
    # before it recorded anything, so that it reports (and mails) the whole regrade
    resumed = ledger.regrades.unfinished(rules.digest, selection.words()) if apply else None
    before = ledger.regrades.judged_before(resumed.id) if resumed is not None else {}
    decided = ledger.regrades.decided(resumed.id) if resumed is not None else {}
    items = select_inputs(ledger, settings, selection, before=before)
    items, widened = _closed_lots_whole(ledger, settings, items, before)
    stats = RunStats()
    folder = regrades_folder(settings)
    folder.mkdir(parents=True, exist_ok=True)
    new_texts, refused = _judge(items, rules, engine, now, folder / "judged.sqlite", stats)
    new_docs = {sha: json.loads(text) for sha, text in new_texts.items()}
    rulebook = rules.rulebook()
    by_lot: dict[str, list[Archived]] = {}
    for item in items:
        by_lot.setdefault(item.lot, []).append(item)
    lots = []
    for lot in sorted(by_lot):
        lots.append(_lot_changes(ledger, lot, new_docs, refused, rulebook, before, decided))
    rule_sets = _rule_sets(rulebook)
    data = _report_input(settings, lots, rulebook, rules.digest, selection, len(items), now,
                         applied=False, regrade_id=None, run_by=run_by, reason=reason,
                         widened=widened)
    regrade_id = None
    applied = 0
    if apply and (resumed is not None or any(c for lot in lots for c in lot.changes)):
        row = ledger.regrades.begin(run_by=run_by, reason=reason, rules_digest=rules.digest,
                                    rule_sets=rule_sets, selection=selection.words(), now=now)
        regrade_id = row.id
        _keep_rule_texts(ledger, rules, now)
        applied = _apply(settings, ledger, rulebook, lots, items, new_docs, new_texts, row.id, now,
                         decided=set(decided))
        data = _report_input(settings, lots, rulebook, rules.digest, selection, len(items),
                             row.started_at, applied=True, regrade_id=row.id,
                             run_by=row.run_by, reason=row.reason, widened=widened)
    stamp = now.astimezone(datetime.UTC).strftime("%Y%m%dT%H%M%SZ")
    target = out or folder
    stem = f"regrade-{regrade_id}" if regrade_id is not None else f"dry-run-{stamp}"
    pdf_path, csv_path = target / f"{stem}-changes.pdf", target / f"{stem}-changes.csv"
    write_atomic(regrade_csv(data), csv_path)
    write_atomic(render_regrade_pdf(data), pdf_path)
    if regrade_id is not None:
        ledger.regrades.finish(regrade_id, dict(counts(data.changed)), now)
        if mail and settings.routing.digests_to:
            _queue_summary(settings, ledger, data, regrade_id, pdf_path, now)
    return Outcome(tuple(lots), len(items), pdf_path, csv_path, regrade_id, applied, stats,
                   tuple(counts(data.changed)), len(decided), tuple(widened))


def _closed_lots_whole(
    ledger: Ledger,
    settings: Settings,
    items: Sequence[Archived],
    before: Mapping[int, ResultRow],
) -> tuple[list[Archived], list[tuple[str, int, int]]]:
    """The selected inputs with every input that counts in each closed lot they touch.

    A closed lot's screens compare each of its cells with the others (their limits come
    from the cells that pass), so a cell of it is decided again only with the whole lot
    judged under the same rules: a part of the lot under the new rules and the rest under
    the old would hold or release cells nobody selected, for no change of their own.
    Returns the inputs, oldest first, and (lot, inputs selected, inputs) of each lot widened.
    """
    selected: dict[str, list[Archived]] = {}
    for item in items:
        selected.setdefault(item.lot, []).append(item)
    out = list(items)
    widened = []
    for lot, chosen in sorted(selected.items()):
        if ledger.lots.get(lot).closed_at is None:
            continue
        whole = select_inputs(ledger, settings, Selection(lots=(lot,)), before=before)
        have = {item.sha256 for item in chosen}
        more = [item for item in whole if item.sha256 not in have]
        if more:
            out += more
            widened.append((lot, len(chosen), len(chosen) + len(more)))
    if widened:
        out.sort(key=lambda item: item.analysed_at or datetime.datetime.min.replace(tzinfo=datetime.UTC))
    return out, widened


def _judge(
    items: Sequence[Archived],
    rules: Rules,
    engine: Engine,
    now: datetime.datetime,
    cache: Path,
    stats: RunStats,
) -> tuple[dict[str, str], dict[str, str]]:
    """Input SHA-256 -> the new result document's text; and -> why the new rules refuse it."""
    work = []
    for item in items:
        profile_text = item.profile.read_text(encoding="utf-8") if item.profile else None
        work.append(RegradeItem(
            sha256=item.sha256, name=item.name, path=str(item.path),
            profile_text=profile_text, profile_name=item.profile.name if item.profile else None,
            key=item.sha256, analysed_at=item.analysed_at, accuracy=accuracy_of(item.result_json),
        ))
    new_texts: dict[str, str] = {}
    refused: dict[str, str] = {}
    if not work:
        return new_texts, refused
    for judged in judge_many(
        work, rules, scheduler=engine.scheduler, workers=engine.workers,
        ship_bytes=engine.ship_bytes, batch_files=engine.batch_files, analysed_at=now,
        cache=cache, progress=engine.progress, stats=stats,
    ):
        if judged.result_json is not None:
            new_texts[judged.sha256] = judged.result_json
        else:
            why = str(judged.error or "not judged").splitlines()[0]
            # not judged at all (a changed or unreadable archived copy): a rerun tries again
            refused[judged.sha256] = why if judged.judged else f"not judged again: {why}"
    return new_texts, refused


def _lot_changes(
    ledger: Ledger,
    lot: str,
    new_docs: Mapping[str, Mapping[str, Any]],
    refused: Mapping[str, str],
    rulebook: Any,
    before: Mapping[int, ResultRow],
    decided: Mapping[tuple[str, str], tuple[DecisionRow | None, DecisionRow]],
) -> LotChanges:
    """The lot's cells decided again; ``before`` and ``decided`` (a regrade that carries on:
    Regrades.judged_before and .decided) put back the judgements and decisions it superseded."""
    from pipeline.station.reviewing import reviewed_cells

    results = [before.get(r.input_id, r) for r in ledger.results.of_lot(lot)]
    old_docs = [json.loads(r.result_json) for r in results if r.verdict != "error"]
    readings = [(s.file_name, s.file_sha256, s.reading) for s in ledger.readings.of(lot)]
    latest = ledger.decisions.latest_of_lot(lot)
    for (of_lot, cell), (superseded, _) in decided.items():
        if of_lot == lot and superseded is not None:
            latest[cell] = superseded
    standing = {
        cell: Standing(d.verdict, d.reason, tuple(d.hazards), d.grade, d.cause)
        for cell, d in latest.items()
    }
    closed = ledger.lots.get(lot).closed_at is not None
    reviews = reviewed_cells(ledger, lot)
    return lot_changes(lot, old_docs, new_docs, refused, readings, standing, reviews, rulebook,
                       closed=closed,
                       old_rulebook=_rules_before(ledger, old_docs, rulebook) if reviews else None)


def _rules_before(ledger: Ledger, old_docs: Sequence[Mapping[str, Any]], rulebook: Any) -> Any:
    """The rule book that decided ``old_docs``: each rule set that judged them, by its text the
    ledger keeps, in place of the new rules' one of the same name (the latest judgement's when
    a lot was judged by several revisions). None when not known (a text the ledger lacks)."""
    from pipeline.rulebook.book import RuleBook, load_rule_set

    latest: dict[str, str] = {}
    for doc in sorted(old_docs, key=lambda d: str(d["analysed_at"])):
        latest[str(doc["rule_set"]["name"])] = str(doc["rule_set"]["sha256"])
    sets = {rs.name: rs for rs in rulebook.rule_sets}
    try:
        for name, sha in latest.items():
            if name in sets and sets[name].sha256 == sha:
                continue
            kept = ledger.facts.text_by_sha(sha)
            if kept is None:
                return None
            sets[name] = load_rule_set(kept[1], kept[0])
        return RuleBook(tuple(sets.values()))
    except FormgateError:
        return None


def _rule_sets(rulebook: Any) -> list[tuple[str, str, str]]:
    return sorted({(r.name, r.revision, r.sha256) for r in rulebook.rule_sets})


def _report_input(
    settings: Settings,
    lots: Sequence[LotChanges],
    rulebook: Any,
    rules_digest: str,
    selection: Selection,
    inputs: int,
    now: datetime.datetime,
    *,
    applied: bool,
    regrade_id: int | None,
    run_by: str,
    reason: str,
    widened: Sequence[tuple[str, int, int]] = (),
) -> RegradeReportInput:
    changed = tuple(
        ChangedCell(
            c.lot, c.cell_id, c.old.verdict, c.new.verdict, c.old.reason, c.new.reason,
            tuple(c.new.hazards), c.old.grade, c.new.grade, c.reviewed,
            tuple(CheckLine(k.file_name, k.rule_id, k.metric, k.old_value, k.new_value,
                            (k.old_low, k.old_high), (k.new_low, k.new_high), k.old_outcome,
                            k.new_outcome) for k in c.checks),
        )
        for lot in lots for c in lot.changes
    )
    refused = tuple((r.lot, r.file_name, r.reason) for lot in lots for r in lot.refused)
    refused += tuple((lot.lot, "(the whole lot)", lot.problem) for lot in lots if lot.problem)
    families = {r.family for r in rulebook.rule_sets}
    return RegradeReportInput(
        station=settings.station_name, run_by=run_by or os.environ.get("USER", "") or "-",
        reason=reason or "dry run", selection=_selection_words(selection, widened),
        started_at=now, applied=applied,
        regrade_id=regrade_id, rule_sets=tuple(_rule_sets(rulebook)), rules_digest=rules_digest,
        inputs=inputs, cells=sum(lot.cells for lot in lots), changed=changed, refused=refused,
        family=families.pop() if len(families) == 1 else None,
    )


def _selection_words(selection: Selection, widened: Sequence[tuple[str, int, int]]) -> str:
    """The selection as the report states it: with the closed lots it took whole, if any."""
    if not widened:
        return selection.words()
    lots = ", ".join(lot for lot, _, _ in widened)
    return f"{selection.words()}; closed lots taken whole (their screens need every cell): {lots}"


def _checks(doc: Mapping[str, Any]) -> tuple[CheckRowData, ...]:
    return tuple(
        CheckRowData(str(c["id"]), str(c["metric"]), c.get("value"), c.get("low"), c.get("high"),
                     str(c["outcome"]), str(c["severity"]), c.get("hazard"))
        for c in doc.get("checks", ())
    )


def _apply(
    settings: Settings,
    ledger: Ledger,
    rulebook: Any,
    lots: Sequence[LotChanges],
    items: Sequence[Archived],
    new_docs: Mapping[str, Mapping[str, Any]],
    new_texts: Mapping[str, str],
    regrade_id: int,
    now: datetime.datetime,
    *,
    decided: set[tuple[str, str]] | None = None,
) -> int:
    """Record every change not held by a review, one cell per transaction; publish its cell.

    ``decided``: the cells that already carry this regrade's decision (a run cut short
    recorded them): not recorded again, but their certificate and cell JSON are published
    for their latest decision, and a closed lot of theirs is reported again, in case the
    run stopped before it. Returns the cells that carry the regrade's decision."""
    from pipeline.station.cellpublish import cell_paths, publish_cell_now
    from pipeline.station.lots import close_and_report

    input_of = {item.sha256: item for item in items}
    earlier = set(decided or ())
    applied = 0

    def publish(lot: str, cell_id: str) -> None:
        _keep_old_certificate(cell_paths(settings, lot, cell_id)[1], regrade_id)
        try:
            publish_cell_now(settings, ledger, rulebook, lot, cell_id, now)
        except FormgateError as exc:
            log.error("cell %s of lot %s: no new certificate: %s", cell_id, lot, exc)

    for lot in lots:
        done = []
        for change in lot.changes:
            if change.reviewed:
                continue
            if (change.lot, change.cell_id) in earlier:
                earlier.discard((change.lot, change.cell_id))
                publish(change.lot, change.cell_id)
                done.append(change.cell_id)
                applied += 1
                continue
            rejudged, files = [], []
            for sha in change.inputs:
                doc, item = new_docs[sha], input_of.get(sha)
                if item is None or item.input_id is None:
                    continue
                text = new_texts[sha]
                stem = f"{safe_name(change.cell_id)}~regrade-{regrade_id}~{safe_name(Path(item.name).name)}"
                json_path = settings.results / safe_name(change.lot) / f"{stem}.json"
                pdf_path = settings.certificates / safe_name(change.lot) / f"{stem}.pdf"
                pdf = _record_certificate(rulebook, item, text, change.cell_id)
                write_atomic(text.encode("utf-8"), json_path)
                files.append(Written(json_path, text.encode("utf-8"), "result"))
                if pdf is not None:
                    write_atomic(pdf, pdf_path)
                    files.append(Written(pdf_path, pdf, "certificate"))
                rejudged.append(Rejudged(
                    item.input_id, str(doc["verdict"]), tuple(doc.get("hazards", ())), text,
                    _checks(doc), str(doc["rule_set"]["name"]), str(doc["rule_set"]["revision"]),
                    str(doc["rule_set"]["sha256"]),
                    datetime.datetime.fromisoformat(str(doc["analysed_at"])), str(json_path),
                    str(pdf_path) if pdf is not None else None,
                ))
            with ledger.db.write():  # the cell's change and its published files: one transaction
                ledger.regrades.apply_cell(
                    regrade_id, lot=change.lot, cell_id=change.cell_id, rejudged=rejudged,
                    verdict=change.new.verdict, reason=change.new.reason,
                    hazards=change.new.hazards, grade=change.new.grade,
                    basis=[f"{st}:{n}:{h}" for st, n, h in change.files], now=now,
                )
                for item_files, r in zip(_per_input(files), rejudged, strict=True):
                    result = ledger.db.one(
                        "SELECT id FROM results WHERE input_id = ? AND regrade_id = ?",
                        (r.input_id, regrade_id),
                    )
                    note_written(ledger, item_files, now=now, lot=change.lot,
                                 cell_id=change.cell_id,
                                 result_id=None if result is None else int(result["id"]))
            publish(change.lot, change.cell_id)
            done.append(change.cell_id)
            applied += 1
        if done and lot.closed:
            close_and_report(settings, ledger, rulebook, lot.lot, by="regrade", now=now,
                             close=False)
    for lot_id, cell_id in sorted(earlier):  # decided by this regrade, not listed now
        publish(lot_id, cell_id)
        applied += 1
    return applied


def _per_input(files: Sequence[Written]) -> list[list[Written]]:
    """The files written for each input judged again: its result, then its certificate."""
    out: list[list[Written]] = []
    for f in files:
        if f.kind == "result":
            out.append([f])
        else:
            out[-1].append(f)
    return out


def _record_certificate(rulebook: Any, item: Archived, text: str, cell_id: str) -> bytes | None:
    """The certificate of one input as the regrade judged it: judged again here, from the same
    bytes, rules and analysis time (so the very document the cluster returned), then rendered
    with the verification code of that document. None when it cannot be (logged)."""
    from pipeline.read.profile import load_profile
    from pipeline.report.certificate import render_html
    from pipeline.report.pdf import render_pdf
    from pipeline.report.result import to_json
    from pipeline.report.verification import verification_code
    from pipeline.runner import judge

    try:
        data = item.path.read_bytes()
        profile = None
        if item.profile is not None:
            profile = load_profile(item.profile.read_text(encoding="utf-8"), item.profile.name)
        assert item.analysed_at is not None
        result = judge(data, item.name, rulebook, analysed_at=item.analysed_at, profile=profile,
                       input_sha256=item.sha256, accuracy=accuracy_of(item.result_json))
    except (OSError, FormgateError) as exc:
        log.error("%s: no certificate for its regrade: %s", item.name, exc)
        return None
    if to_json(result) != text:  # pragma: no cover - judging is a function of its inputs
        log.error("%s: judged again here, it differs from the cluster's judgement", item.name)
        return None
    return render_pdf(render_html(result, verification_code(text),
                                  cell_certificate=f"{cell_file_stem(cell_id)}.pdf"))


def _keep_rule_texts(ledger: Ledger, rules: Rules, now: datetime.datetime) -> None:
    """Keep the exact text of every rule set and profile the regrade judged with, by SHA-256,
    as the station keeps its own: an auditor reads the rules behind any certificate."""
    for name, text in rules.files:
        ledger.facts.remember_text(
            kind="profile" if name.startswith("profiles/") else "rule_set",
            sha256=hashlib.sha256(text.encode("utf-8")).hexdigest(),
            name=Path(name).name, text=text, now=now,
        )


def _keep_old_certificate(path: Path, regrade_id: int) -> None:
    """Keep a cell's certificate as it was before the regrade, beside the new one."""
    kept = path.with_name(path.name.replace("~cell.pdf", f"~cell.before-regrade-{regrade_id}.pdf"))
    if path.is_file() and not kept.exists():
        shutil.copy2(path, kept)


def _queue_summary(
    settings: Settings,
    ledger: Ledger,
    data: RegradeReportInput,
    regrade_id: int,
    pdf_path: Path,
    now: datetime.datetime,
) -> None:
    from pipeline.mail.regrade_letter import regrade_letter

    letter = regrade_letter(
        regrade_id=regrade_id, station=settings.station_name, run_by=data.run_by,
        reason=data.reason, rule_sets=data.rule_sets, counts=counts(data.changed),
        new_fails=sum(1 for c in data.changed
                      if c.new_verdict == "fail" and c.old_verdict != "fail" and not c.reviewed),
        family=data.family, recipients=settings.routing.digests_to, report_path=str(pdf_path),
        domain=settings.routing.domain,
    )
    ledger.outbox.queue(letter, now=now)
