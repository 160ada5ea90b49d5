"""Verification of what a station published, and of its whole ledger: the work of `formgate verify`.

A certificate, result JSON, lot report or export is *verified* when the SHA-256 of its
bytes is among the ledger's published files (published_files.py records each one as it
is written). Its provenance is checked with it: the result it shows (whose JSON text the
ledger keeps), the input it was judged from (re-hashed in the archive), the rule-set text
that judged it (kept in the ledger under its SHA-256, re-hashed), and the files published
with it (on disk as recorded). A file that is not verified is explained where it can be:
a file at a published path was changed since; a result JSON still names its cell and input,
and its differences from the published one are listed; a certificate still carries its
verification code in its metadata, which leads to the certificate it claims to be.

The whole ledger (:func:`verify_ledger`): SQLite's own integrity, rows that name rows no
longer there, the hash chains of decisions and reviews (ledger/chain.py), every published
file still on disk as recorded, every archived input still matching its SHA-256, every rule
text still matching its hash. A chain shows a row changed, inserted or removed before its
last row; it cannot show its last rows removed, or every hash rewritten after an edit: the
last hash of each chain is printed, to be kept elsewhere and compared.

Reads only (the ledger and the files); the command line prints what it finds
(cli/verify.py).
"""

from __future__ import annotations

import datetime
import hashlib
import itertools
import json
import re
import zlib
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from pipeline.ledger.chain import FIELDS, broken_links, chained_rows
from pipeline.ledger.ledger import Ledger
from pipeline.ledger.rows import DecisionRow, PublishedRow, ResultRow
from pipeline.report.verification import CODE_DIGITS, spaced
from pipeline.station.published_files import located, recorded_path
from pipeline.station.settings import Settings

_CODE_IN_PDF = re.compile(rb"verification code ([0-9a-f]{%d})" % CODE_DIGITS)
_STREAM = re.compile(rb"stream\r?\n")
_MAX_STREAMS = 5000  # a certificate has a few hundred; a hostile file costs no more than this
_MAX_INFLATED = 4 << 20  # bytes inflated per stream: metadata is small, a zip bomb is not read
_MAX_DIFFERENCES = 8
_KIND_WORDS = {
    "result": "result JSON",
    "certificate": "certificate",
    "cell result": "cell result JSON",
    "cell certificate": "cell certificate",
    "lot report": "lot report",
    "lot export": "lot export",
}
_JSON_KINDS = ("result", "cell result")


@dataclass(frozen=True, slots=True)
class Finding:
    """One line of a verification: ``ok`` True (it holds), False (it does not), None (a fact)."""

    ok: bool | None
    text: str


@dataclass(frozen=True, slots=True)
class Verification:
    """What was checked (a file, a code, the ledger) and every finding about it."""

    subject: str
    findings: tuple[Finding, ...]

    @property
    def verified(self) -> bool:
        """Something was shown to hold, and nothing failed."""
        return any(f.ok for f in self.findings) and not any(f.ok is False for f in self.findings)


class Verifier:
    """Checks files, verification codes and the whole ledger of one station."""

    def __init__(self, settings: Settings, ledger: Ledger) -> None:
        self.settings = settings
        self.ledger = ledger
        self.root = Path(recorded_path(settings.root))
        self._chain_problems: dict[str, list[str]] = {}  # per table, walked once

    def _chained(self, table: str, row_id: int) -> Finding:
        """Whether one row still holds its place in its table's hash chain."""
        if table not in self._chain_problems:
            rows = chained_rows(self.ledger.db.conn, table)
            self._chain_problems[table] = broken_links(table, rows)[0]
        named = [p for p in self._chain_problems[table] if p.startswith(f"{table} row {row_id}:")]
        if named:
            return Finding(False, "; ".join(named))
        return Finding(True, f"{table} row {row_id} holds its place in the ledger's hash chain")

    # ---- one file ---------------------------------------------------------------------------

    def file(self, path: Path, data: bytes) -> Verification:
        """Is ``data`` (the bytes of the file at ``path``) a file this station published?"""
        sha = hashlib.sha256(data).hexdigest()
        rows = self.ledger.published.by_sha(sha)
        here = self._at_path(path)
        if not rows:
            findings = [Finding(False, f"its bytes are not those of any file this station "
                                       f"published (its SHA-256 is {sha})")]
            findings += self._claims(path, data, here)
            return Verification(str(path), tuple(findings))
        # at its place: as recorded, or at the same place of a station copied elsewhere
        same_place = ([r for r in rows if here is not None and r.path == here.path]
                      or [r for r in rows if _same_file(self._locate(r.path), path)])
        row = same_place[0] if same_place else rows[0]
        findings = [Finding(True, f"{self._describe(row)}, as published "
                                  f"{_when(row.published_at)} (SHA-256 {sha})")]
        if not same_place:
            findings.append(Finding(None, f"a copy of {self._shown(self._locate(row.path))}"))
        if here is not None and here.sha256 != sha:
            findings.append(Finding(None, f"the file published last at this path is another: "
                                          f"{self._describe(here)}, {_when(here.published_at)}"))
        findings += self._provenance(row, skip=row)
        return Verification(str(path), tuple(findings))

    def _at_path(self, path: Path) -> PublishedRow | None:
        """The latest published row at ``path`` (as given, or with its links resolved)."""
        for name in dict.fromkeys((recorded_path(path), str(path.resolve()))):
            row = self.ledger.published.by_path(name)
            if row is not None:
                return row
        return None

    def _claims(self, path: Path, data: bytes, here: PublishedRow | None) -> list[Finding]:
        """Which published file a file that is not verified claims to be, and how it differs."""
        doc = _json_document(data)
        if here is not None:
            found = [Finding(False, f"the station published {self._describe(here)} at this path "
                                    f"{_when(here.published_at)}, with SHA-256 {here.sha256}: "
                                    "this file was changed since")]
            if here.kind == "result" and here.result_id is not None:
                found += self._differences(data, doc, here.result_id)
            return found
        if doc is not None:
            result = self._result_named_in(doc)
            if result is not None:
                return self._claimed_result(data, doc, result)
        for code in codes_in_pdf(data):
            found = self._claimed_certificate(code)
            if found:
                return found
        return [Finding(None, "nothing in it names a file this station published")]

    def _result_named_in(self, doc: dict[str, Any]) -> ResultRow | None:
        """The recorded result a (possibly edited) result JSON names by its cell and input."""
        cell, source = doc.get("cell"), doc.get("input")
        if not isinstance(cell, dict) or not isinstance(source, dict):
            return None
        lot, cell_id, sha = cell.get("lot"), cell.get("cell_id"), source.get("sha256")
        if not all(isinstance(v, str) for v in (lot, cell_id, sha)):
            return None
        for result in reversed(self.ledger.results.of_cell(str(lot), str(cell_id))):
            row = self.ledger.inputs.get(result.input_id)
            if row is not None and row.sha256 == sha:
                return result
        return None

    def _claimed_result(
        self, data: bytes, doc: dict[str, Any], result: ResultRow
    ) -> list[Finding]:
        published = self._files_of(result.lot, result.cell_id, result_id=result.id)
        json_row = published.get("result")
        cell = f"cell {result.cell_id} of lot {result.lot}"
        if json_row is None:
            return [Finding(False, f"it names {cell} and the input it was judged from, but no "
                                   "result JSON of that record was recorded as published")]
        found = [Finding(False, f"it names {cell} and its input: the result published for it is "
                                f"{self._shown(self._locate(json_row.path))} (SHA-256 "
                                f"{json_row.sha256}), and this file differs from it")]
        return found + self._differences(data, doc, result.id)

    def _claimed_certificate(self, code: str) -> list[Finding]:
        rows = [r for r in self.ledger.published.by_sha(code) if r.kind in _JSON_KINDS]
        if not rows:
            return []
        json_row = rows[0]
        found = [Finding(False, f"it carries verification code {spaced(code)}: that of "
                                f"{self._describe(json_row)}, published as "
                                f"{self._shown(self._locate(json_row.path))}")]
        if json_row.lot is not None and json_row.cell_id is not None:
            files = self._files_of(json_row.lot, json_row.cell_id, result_id=json_row.result_id,
                                   decision_id=json_row.decision_id)
            for kind, row in files.items():
                if kind not in _JSON_KINDS:
                    found.append(Finding(False, f"the {_KIND_WORDS.get(kind, kind)} published with it is "
                                                f"{self._shown(self._locate(row.path))} (SHA-256 "
                                                f"{row.sha256}), and this file differs from it"))
        return found

    def _differences(self, data: bytes, doc: dict[str, Any] | None, result_id: int) -> list[Finding]:
        """What a changed result JSON says differently from the text the ledger keeps."""
        result = self.ledger.results.get(result_id)
        if result is None:
            return []
        if doc is None:
            return [Finding(None, "it is not a JSON document any more")]
        kept = json.loads(result.result_json)
        changes = list(_differ(doc, kept))
        if not changes:
            return [Finding(None, "its values are those published; only its layout differs")]
        shown = [Finding(None, f"{where}: {ours} in this file, {theirs} as published")
                 for where, ours, theirs in changes[:_MAX_DIFFERENCES]]
        if len(changes) > _MAX_DIFFERENCES:
            shown.append(Finding(None, f"and {len(changes) - _MAX_DIFFERENCES} more differences"))
        return shown

    # ---- a verification code ----------------------------------------------------------------

    def code(self, code: str) -> Verification:
        """The published file a verification code (or any hash prefix) names, and its files."""
        rows = self.ledger.published.by_sha(code)
        if not rows:
            return Verification(code, (Finding(False, "no file this station published has this "
                                                      "verification code or hash"),))
        if len({r.sha256 for r in rows}) > 1:
            listed = [Finding(None, f"{self._describe(r)}: {self._shown(self._locate(r.path))}")
                      for r in rows]
            return Verification(code, (
                Finding(False, f"{len({r.sha256 for r in rows})} published files begin with this "
                               "hash: give more of its digits"),
                *listed,
            ))
        row = next((r for r in rows if r.kind in _JSON_KINDS), rows[0])
        findings = [self._on_disk(row), *self._provenance(row, skip=row)]
        return Verification(code, tuple(findings))

    # ---- provenance of a published file -----------------------------------------------------

    def _provenance(self, row: PublishedRow, *, skip: PublishedRow) -> list[Finding]:
        """What ``row`` shows, the files published with it, and the result, input and rule set
        behind it (``skip``: the file already checked)."""
        findings: list[Finding] = []
        result = None
        if row.result_id is not None:
            result = self.ledger.results.get(row.result_id)
            if result is None:
                return [Finding(False, f"the result it shows (ledger result {row.result_id}) is "
                                       "not in the ledger")]
            findings.append(Finding(None, _record_words(result)))
        elif row.decision_id is not None and row.lot is not None and row.cell_id is not None:
            decision = next((d for d in self.ledger.decisions.of_cell(row.lot, row.cell_id)
                             if d.id == row.decision_id), None)
            if decision is None:
                findings.append(Finding(False, f"the decision it shows (decisions row "
                                               f"{row.decision_id}) is not in the ledger"))
            else:
                findings.append(Finding(None, f"it shows decision {decision.id}: "
                                              f"{_decision_words(decision)}"))
                findings.append(self._chained("decisions", decision.id))
                findings += [self._basis_input(entry) for entry in decision.basis
                             if not entry.startswith("review:")]
        files: dict[str, PublishedRow] = {}
        if row.lot is not None and row.cell_id is not None:
            files = self._files_of(row.lot, row.cell_id, result_id=row.result_id,
                                   decision_id=row.decision_id)
            findings += [self._on_disk(other) for kind, other in files.items() if kind != skip.kind]
            json_row = next((files[k] for k in _JSON_KINDS if k in files), None)
            if json_row is not None:
                findings.append(Finding(None, "verification code "
                                              f"{spaced(json_row.sha256[:CODE_DIGITS])}"))
            if result is None and "cell result" in files:
                findings.append(self._cell_rule_text(files["cell result"]))
        if result is not None:
            if "result" in files:
                kept = hashlib.sha256(result.result_json.encode("utf-8")).hexdigest()
                findings.append(
                    Finding(True, f"the ledger keeps the same result JSON (result {result.id})")
                    if kept == files["result"].sha256
                    else Finding(False, f"the result JSON the ledger keeps (result {result.id}) is "
                                        "not the one published (changed in the ledger)")
                )
            findings.append(self._input(result))
            findings.append(self._rule_text(result.rule_set_name, result.rule_set_revision,
                                            result.rule_set_sha256))
        if row.lot is not None and row.cell_id is not None:
            standing = self.ledger.decisions.latest(row.lot, row.cell_id)
            if standing is not None:
                later = (f" (decision {standing.id}, later than the one it shows)"
                         if row.decision_id is not None and standing.id != row.decision_id else "")
                findings.append(Finding(None, "the cell's standing decision: "
                                              f"{_decision_words(standing)}{later}"))
        return findings

    def _files_of(
        self, lot: str, cell_id: str, *, result_id: int | None, decision_id: int | None = None
    ) -> dict[str, PublishedRow]:
        """The latest published file of each kind for one record (by result) or decision."""
        files: dict[str, PublishedRow] = {}
        for p in self.ledger.published.of_cell(lot, cell_id):
            if (result_id is not None and p.result_id == result_id) or (
                result_id is None and decision_id is not None and p.decision_id == decision_id
            ):
                files[p.kind] = p  # of_cell is in id order: the latest of a kind wins
        return files

    def _input(self, result: ResultRow) -> Finding:
        row = self.ledger.inputs.get(result.input_id)
        if row is None:
            return Finding(False, f"the input it was judged from (ledger input {result.input_id}) "
                                  "is not in the ledger")
        what = f"judged from {row.name} (SHA-256 {row.sha256})"
        if row.final_path is None or row.state not in ("archived", "duplicate"):
            return Finding(None, f"{what}: not archived yet ({row.state})")
        return self._rehash(self._locate(row.final_path), row.sha256, f"{what}, archived as")

    def _basis_input(self, entry: str) -> Finding:
        """One file a decision rests on ("stage words:file name:SHA-256"), re-hashed in the
        archive: the bytes the cell was decided from are still those recorded."""
        stage, _, rest = entry.partition(":")  # stage words never hold a colon; a name may
        name, _, sha = rest.rpartition(":")
        what = f"it rests on {stage}: {name} (SHA-256 {sha or 'not recorded'})"
        rows = self.ledger.inputs.by_sha256(sha) if sha else []
        if not rows:
            return Finding(False, f"{what}: no input with these bytes is in the ledger")
        kept = [r for r in rows if r.state == "archived" and r.final_path]
        row = next((r for r in kept if r.name == name), kept[0] if kept else None)
        if row is None or row.final_path is None:
            return Finding(None, f"{what}: not archived yet ({rows[-1].state})")
        return self._rehash(self._locate(row.final_path), sha, f"{what}, archived as")

    def _cell_rule_text(self, json_row: PublishedRow) -> Finding:
        """The rule set a cell JSON names, its text checked in the ledger; read from the JSON
        as published (a JSON changed since names nothing the ledger vouches for)."""
        path = self._locate(json_row.path)
        try:
            data = path.read_bytes()
        except OSError:
            return Finding(None, "the rule set it was decided under cannot be read: its cell "
                                 "JSON is not at its place")
        named = (_json_document(data) or {}).get("rule_set")
        if hashlib.sha256(data).hexdigest() != json_row.sha256 or not isinstance(named, dict):
            return Finding(None, "the rule set it was decided under cannot be read: its cell "
                                 "JSON is not the one published")
        name, revision, sha = (named.get(k) for k in ("name", "revision", "sha256"))
        if not all(isinstance(v, str) for v in (name, revision, sha)):
            return Finding(False, "its cell JSON names no rule set")
        return self._rule_text(str(name), str(revision), str(sha))

    def _rule_text(self, name: str, revision: str, sha: str) -> Finding:
        what = f"rule set {name} revision {revision} (SHA-256 {sha})"
        kept = self.ledger.facts.text_by_sha(sha)
        if kept is None:
            return Finding(False, f"{what}: its text is not in the ledger")
        if hashlib.sha256(kept[1].encode("utf-8")).hexdigest() != sha:
            return Finding(False, f"{what}: the text the ledger keeps under its hash does not "
                                  "hash to it (changed in the ledger)")
        return Finding(True, f"{what}: its exact text is in the ledger")

    def _on_disk(self, row: PublishedRow) -> Finding:
        """Is the file a published row names still at its path, with its recorded bytes?"""
        return self._rehash(self._locate(row.path), row.sha256, f"its {_KIND_WORDS.get(row.kind, row.kind)}")

    def _rehash(self, path: Path, sha: str, what: str) -> Finding:
        try:
            with path.open("rb") as fh:
                now = hashlib.file_digest(fh, "sha256").hexdigest()
        except FileNotFoundError:
            return Finding(False, f"{what} {self._shown(path)}: missing")
        except OSError as exc:
            return Finding(False, f"{what} {self._shown(path)}: cannot be read "
                                  f"({exc.strerror or exc})")
        if now != sha:
            return Finding(False, f"{what} {self._shown(path)}: changed (its SHA-256 is now {now}, "
                                  f"{sha} was recorded)")
        return Finding(True, f"{what} {self._shown(path)}: same bytes as recorded")

    # ---- the whole ledger -------------------------------------------------------------------

    def whole_ledger(self) -> Verification:
        """Integrity, references, chains, published files, archived inputs, rule texts."""
        db = self.ledger.db
        dangling = db.dangling_references()
        if db.integrity_ok():  # PRAGMA integrity_check, and no dangling reference
            findings = [Finding(True, "SQLite integrity check: ok")]
        elif dangling:
            findings = [Finding(False, "SQLite integrity check: rows name rows that are no longer "
                                       "there (below)")]
        else:
            findings = [Finding(False, "SQLite integrity check: not ok (PRAGMA integrity_check "
                                       "names the damage)")]
        for table, rowid, parent in dangling:
            findings.append(Finding(False, f"{table} row {rowid}: it names a row of {parent} that "
                                           "is not there (removed by hand?)"))
        findings += self._chains()
        findings += self._published_files()
        findings += self._archived_inputs()
        for name, revision, sha in self.ledger.results.rule_sets():
            findings.append(self._rule_text(name, revision, sha))
        return Verification(str(self.settings.ledger), tuple(findings))

    def _chains(self) -> list[Finding]:
        findings: list[Finding] = []
        for table in FIELDS:
            rows = chained_rows(self.ledger.db.conn, table)
            problems, last = broken_links(table, rows)
            by_id = {int(str(r["id"])): r for r in rows}
            for problem in problems:
                findings.append(Finding(False, problem + _row_words(table, problem, by_id)))
            ids = sorted(by_id)
            for before, after in itertools.pairwise(ids):
                if after != before + 1:  # ids are given in order: a gap is a row removed
                    missing = f"{before + 1}" + (f" to {after - 1}" if after - 1 > before + 1 else "")
                    findings.append(Finding(False, f"{table}: no row {missing} between rows "
                                                   f"{before} and {after} (removed)"))
            if not problems:
                findings.append(Finding(True, f"{table}: {len(rows)} rows, the hash chain is "
                                              "unbroken"))
            end = f"row {ids[-1]}" if ids else "no rows"
            findings.append(Finding(None, f"{table}: last hash {last} ({end}): keep it elsewhere"))
        return findings

    def _published_files(self) -> list[Finding]:
        latest: dict[str, PublishedRow] = {}
        for row in self.ledger.published.every():
            # a path published again (a lot report, a retest) counts last; a station copied or
            # moved elsewhere recorded its later files under their new paths: the same place
            latest[str(self._locate(row.path))] = row
        findings = [f for f in map(self._on_disk, latest.values()) if not f.ok]
        for row in latest.values():
            if row.kind != "result" or row.result_id is None:
                continue
            result = self.ledger.results.get(row.result_id)
            # a result row holds its result's own JSON text, wherever the file was moved
            if result is not None and hashlib.sha256(
                result.result_json.encode("utf-8")
            ).hexdigest() != row.sha256:
                findings.append(Finding(False, f"ledger result {result.id}: the JSON text it keeps "
                                               "is not the one published as "
                                               f"{self._shown(self._locate(row.path))} (changed "
                                               "in the ledger)"))
        if not findings:
            findings.append(Finding(True, f"published files: {len(latest)}, each on disk with the "
                                          "bytes recorded"))
        return findings

    def _archived_inputs(self) -> list[Finding]:
        rows = [r for r in self.ledger.inputs.in_state("archived", "duplicate") if r.final_path]
        findings = []
        for row in rows:
            assert row.final_path is not None
            found = self._rehash(self._locate(row.final_path), row.sha256,
                                 f"input {row.id} ({row.name}), archived as")
            if not found.ok:
                findings.append(found)
        if not findings:
            findings.append(Finding(True, f"archived inputs: {len(rows)}, each with the SHA-256 "
                                          "the ledger recorded"))
        return findings

    # ---- paths ------------------------------------------------------------------------------

    def _locate(self, recorded: str) -> Path:
        return located(self.settings, recorded)

    def _shown(self, path: str | Path) -> str:
        """A path relative to the station folder when it is inside it (shorter to read)."""
        full = Path(recorded_path(Path(path)))
        try:
            return str(full.relative_to(self.root))
        except ValueError:
            return str(path)

    def _describe(self, row: PublishedRow) -> str:
        kind = _KIND_WORDS.get(row.kind, row.kind)
        if row.cell_id is not None:
            return f"the {kind} of cell {row.cell_id} (lot {row.lot})"
        return f"the {kind} of lot {row.lot}" if row.lot is not None else f"a {kind}"


# ---- pure helpers -----------------------------------------------------------------------------


def codes_in_pdf(data: bytes) -> list[str]:
    """The verification codes a PDF's metadata carries (its compressed streams inflated,
    within bounds), in order of appearance, once each."""
    if not data.startswith(b"%PDF"):
        return []
    found = [m.group(1) for m in _CODE_IN_PDF.finditer(data)]
    for n, m in enumerate(_STREAM.finditer(data)):
        if n >= _MAX_STREAMS:
            break
        try:
            text = zlib.decompressobj().decompress(data[m.end():], _MAX_INFLATED)
        except zlib.error:
            continue
        found += [c.group(1) for c in _CODE_IN_PDF.finditer(text)]
    return list(dict.fromkeys(c.decode("ascii") for c in found))


def _json_document(data: bytes) -> dict[str, Any] | None:
    try:
        doc = json.loads(data.decode("utf-8"))
    except (UnicodeDecodeError, ValueError, RecursionError):
        return None
    return doc if isinstance(doc, dict) else None


def _differ(ours: object, theirs: object, where: str = "") -> Iterator[tuple[str, str, str]]:
    """(where, this value, published value) for each value that differs, depth first."""
    if isinstance(ours, dict) and isinstance(theirs, dict):
        for key in list(theirs) + [k for k in ours if k not in theirs]:
            inner = f"{where}.{key}" if where else str(key)
            if key not in ours:
                yield inner, "missing", _short(theirs[key])
            elif key not in theirs:
                yield inner, _short(ours[key]), "absent"
            else:
                yield from _differ(ours[key], theirs[key], inner)
    elif isinstance(ours, list) and isinstance(theirs, list) and len(ours) == len(theirs):
        for i, (a, b) in enumerate(zip(ours, theirs, strict=True)):
            yield from _differ(a, b, f"{where}[{i}]")
    elif ours != theirs or type(ours) is not type(theirs):
        yield where or "the document", _short(ours), _short(theirs)


def _short(value: object) -> str:
    text = json.dumps(value, ensure_ascii=False)
    return text if len(text) <= 60 else text[:57] + "..."


def _record_words(result: ResultRow) -> str:
    """One record as a line: verdict, cell, stages, analysis time, and a later record."""
    stages = json.loads(result.result_json).get("stages") or []
    of = f" ({' and '.join(stages)})" if stages else ""
    later = (f"; a later record of the cell supersedes it (result {result.superseded_by})"
             if result.superseded_by is not None else "")
    return (f"{result.verdict} for cell {result.cell_id} of lot {result.lot}{of}, analysed "
            f"{_when(result.analysed_at)}{later}")


def _decision_words(decision: DecisionRow) -> str:
    reason = f": {decision.reason}" if decision.reason else ""
    return f"{decision.verdict}{reason} ({decision.cause}, {_when(decision.decided_at)})"


def _when(moment: datetime.datetime) -> str:
    return moment.astimezone(datetime.UTC).strftime("%Y-%m-%d %H:%M:%S UTC")


def _row_words(table: str, problem: str, by_id: dict[int, dict[str, object]]) -> str:
    """What a row named in a chain problem holds now, so that a reader can find it."""
    match = re.match(rf"{table} row (\d+):", problem)
    row = by_id.get(int(match.group(1))) if match else None
    if row is None:
        return ""
    fields = [f"cell {row['cell_id']} of lot {row['lot']}"]
    for name in ("verdict", "action", "reviewer"):
        if name in row:
            fields.append(f"{name} {row[name]}")
    return f" [it now says: {', '.join(fields)}]"



def _same_file(one: Path, other: Path) -> bool:
    try:
        return one.exists() and one.samefile(other)
    except OSError:
        return False
