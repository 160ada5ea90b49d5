"""What a hostile or oversized input costs: long identifiers, a gzip bomb, the largest files the limits allow.

Prints one plain-text table (nothing is written to the docs). Every case runs in a fresh
process of its own, so that its peak memory (``ru_maxrss``, and ``VmPeak``: the address
space that a station worker's ``worker_memory_MB`` limits) is its own:

- **identifiers**: ``formgate check --out DIR`` on a good test file, on files whose cell id
  is 64 or 3,000 battery emoji (U+1F50B, 4 bytes each) or 6,000 ASCII letters, and on a
  file with 64 metadata entries whose keys and values are 256 bytes of CJK text (the most
  the reader accepts, and the slowest certificate within the limits). "command" is the
  whole command (Python's start and imports included, best of three); "work" is
  ``runner.check_file`` alone, the best of three in a warm process. For the other parts,
  "command" is the whole child process and "work" the reading or judging alone.
- **gzip bomb**: 10 GiB of zero lines (a cycle file's head, then ``0`` x 1023 and a line
  feed, again and again) as a 22 MB .csv.gz, built by streaming; read by ``formgate
  check`` (the reader's own limit) and by a station worker under the default station
  settings, its memory limited as a station limits it.
- **largest within the defaults**: a worker with the default ``worker_memory_MB`` judges
  and certifies a 2,000,000-row record (``max_rows``), a record of
  ``max_uncompressed_MB`` of text with a note column, and a record of that size with
  240 columns the rule set does not read; each as a .csv.gz.

Run: ``.venv/bin/python benchmarks/hostile_inputs.py`` (about 3 minutes on 2 cores;
``--skip largest`` leaves out the slowest part). Machine noise moves the seconds, not
the outcomes; the test suite checks the outcomes and memory, never the seconds.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

REPO = Path(__file__).resolve().parent.parent
if str(REPO) not in sys.path:
    sys.path.append(str(REPO))  # after PYTHONPATH: another checkout's pipeline may be measured

MIB = 2**20
BATTERY = "\N{BATTERY}"


def _peaks() -> dict[str, float]:
    """This process's peak resident memory and address space.

    VmHWM, not ru_maxrss: Linux carries a process's ru_maxrss over fork and exec, so a
    child of a large process would report its parent's peak.
    """
    status = Path("/proc/self/status").read_text()

    def mib(field: str) -> float:
        return int(status.split(f"{field}:")[1].split()[0]) / 1024

    return {"maxrss_mib": mib("VmHWM"), "vmpeak_mib": mib("VmPeak")}


def _settings(folder: Path) -> Any:
    """The default station settings (a station.toml that sets only what it must)."""
    from pipeline.station.settings import read_settings

    folder.mkdir(parents=True, exist_ok=True)
    (folder / "station.toml").write_text(
        '[station]\nname = "bench"\n\n[inbox.main]\nfolder = "inbox"\nhandover = "rename"\n',
        encoding="utf-8",
    )
    return read_settings(folder)


def case_check(path: str, rules: str, out: str) -> dict[str, Any]:
    """Child: ``formgate check`` on one file, timed from inside after the imports as well."""
    import datetime

    from pipeline.rulebook.book import load_rules_dir
    from pipeline.runner import check_file
    from pipeline.station.worker import prepare_process

    prepare_process()
    rulebook = load_rules_dir(Path(rules))
    at = datetime.datetime(2026, 3, 2, tzinfo=datetime.UTC)
    best, outcome = float("inf"), ""
    for k in range(3):
        started = time.perf_counter()
        done = check_file(Path(path), rulebook, Path(out) / str(k), analysed_at=at)
        best = min(best, time.perf_counter() - started)
        outcome = str(done.error).splitlines()[0] if done.error else done.result.verdict.kind.value
    return {"work_s": best, "outcome": outcome, **_peaks()}


def case_cli(path: str, rules: str) -> dict[str, Any]:
    """Child: the command line's main, in this process, on one file (its peak memory is this process's)."""
    import contextlib
    import io

    from pipeline.cli.main import main

    printed = io.StringIO()
    started = time.perf_counter()
    with contextlib.redirect_stdout(printed):
        main(["check", path, "--rules", rules, "--no-pdf"])
    line = printed.getvalue().splitlines()[0]
    return {"work_s": time.perf_counter() - started, "outcome": line.split("  ", 2)[-1], **_peaks()}


def case_worker(path: str, station: str, certify: str) -> dict[str, Any]:
    """Child: a station worker under the default settings judges one file (judges.py's way)."""
    import datetime
    import hashlib

    from pipeline.ledger.rows import InputRow
    from pipeline.rulebook.book import RuleBook, load_rule_set
    from pipeline.station.tasks import Tasks
    from pipeline.station.worker import init_worker, run_task
    from tests.station_kit import RULES

    settings = _settings(Path(station))
    digest = hashlib.sha256(Path(path).read_bytes()).hexdigest()
    at = datetime.datetime(2026, 3, 2, tzinfo=datetime.UTC)
    row = InputRow(1, digest, Path(path).name, Path(path).stat().st_size, at, "claimed", None,
                   None, 1, None, None, work_path=path)
    rulebook = RuleBook((load_rule_set(RULES, "test.toml"),))
    tasks = Tasks(settings, *[None] * 6)  # task_for reads only the settings
    task = tasks.task_for(row, rulebook, at, certify)
    init_worker(None, None, int(settings.worker_memory_MB * MIB))
    started = time.perf_counter()
    output = run_task(task)
    if output.error:
        outcome = output.error.splitlines()[0].split(": ", 1)[1]
    else:
        assert output.result is not None
        outcome = f"{output.result.verdict.kind.value}, {len(output.pdf or b'') // 1024} kB PDF"
    limits = f"worker_memory_MB = {settings.worker_memory_MB:g}, " \
             f"max_uncompressed_MB = {settings.max_uncompressed_MB:g}"
    return {"work_s": time.perf_counter() - started, "outcome": outcome, "limits": limits, **_peaks()}


CASES = {"check": case_check, "cli": case_cli, "worker": case_worker}


def child(case: str, *args: str) -> dict[str, Any]:
    started = time.perf_counter()
    run = subprocess.run(
        [sys.executable, __file__, "--case", case, *args],
        capture_output=True, text=True, check=False, timeout=1800,
    )
    if run.returncode != 0:
        raise RuntimeError(f"case {case} {args} failed:\n{run.stderr[-3000:]}")
    found: dict[str, Any] = json.loads(run.stdout.splitlines()[-1])
    found["command_s"] = time.perf_counter() - started
    return found


def _command(path: Path, rules: Path, out: Path) -> float:
    """Seconds of a whole ``formgate check --out`` command on one file (best of three)."""
    best = float("inf")
    for _ in range(3):
        started = time.perf_counter()
        subprocess.run(
            [sys.executable, "-m", "pipeline", "check", str(path), "--rules", str(rules), "--out", str(out)],
            capture_output=True, check=False, timeout=600,
        )
        best = min(best, time.perf_counter() - started)
    return best


def _record_text(rows: int, *, note: int = 0, wide: int = 0, cell_id: str = "BIG-1") -> bytes:
    """A TEST-CELL record of about ``rows`` rows; ``note`` characters of a text column,
    ``wide`` more columns of one digit (none of them read by the rule set)."""
    from tests.factories import build_trace, simple_formation

    phases = simple_formation(capacity_ah=2.0, final_rest_s=3600.0)
    total_s = sum(p.duration_s for p in phases)
    trace = build_trace(phases, dt_s=total_s / rows, noise_v=5e-4)
    head = f"# cell_id: {cell_id}\n# lot: LOT-A\n# cell_type: TEST-CELL\ntime_s,voltage_V,current_A"
    head += ",temperature_C" + (",note" if note else "") + "".join(f",x{k}" for k in range(wide))
    tail = ("," + "n" * note if note else "") + ",0" * wide
    lines = [head]
    lines.extend(
        f"{t:.3f},{v:.6f},{i:.6f},{c:.2f}{tail}"
        for t, v, i, c in zip(trace.time_s, trace.voltage_v, trace.current_a, trace.temperature_c,
                              strict=True)
    )
    return ("\n".join(lines) + "\n").encode()


def _gz(text: bytes, path: Path) -> Path:
    import zlib

    packer = zlib.compressobj(1, zlib.DEFLATED, 31)
    with path.open("wb") as out:
        for start in range(0, len(text), 4 * MIB):
            out.write(packer.compress(text[start : start + 4 * MIB]))
        out.write(packer.flush())
    return path


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--skip", default="", help="comma-separated parts: identifiers, bomb, largest")
    parser.add_argument("--bomb-gib", type=float, default=10.0)
    parser.add_argument("--text-mib", type=float, default=0.0,
                        help="text of the largest files (default: the default max_uncompressed_MB)")
    parser.add_argument("--case", help=argparse.SUPPRESS)
    parser.add_argument("args", nargs="*", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.case:
        print(json.dumps(CASES[args.case](*args.args)))
        return 0
    from tests.hostile import with_cell_id, with_metadata, write_gzip_bomb
    from tests.station_kit import RULES, cycle_file

    skip = set(filter(None, args.skip.split(",")))
    rows: list[tuple[str, str, dict[str, Any]]] = []
    with tempfile.TemporaryDirectory(prefix="formgate-hostile-") as tmp:
        folder = Path(tmp)
        rules = folder / "rules"
        rules.mkdir()
        (rules / "test.toml").write_text(RULES, encoding="utf-8")
        if "identifiers" not in skip:
            cjk = "".join(chr(0x4E00 + k) for k in range(85))  # 255 bytes
            files = {
                "good file (cell id X-1)": cycle_file("X-1"),
                "cell id 64 x U+1F50B (256 B)": with_cell_id(BATTERY * 64),
                "cell id 3,000 x U+1F50B (12,000 B)": with_cell_id(BATTERY * 3000),
                "cell id 6,000 x 'A'": with_cell_id("A" * 6000),
                "64 entries of 255 B CJK key and value": with_metadata(
                    {f"{cjk[:84]}{chr(0x4E00 + 100 + k)}": cjk for k in range(61)}
                ),
            }
            for label, data in files.items():
                path = folder / "in.csv"
                path.write_bytes(data)
                found = child("check", str(path), str(rules), str(folder / "out"))
                found["command_s"] = _command(path, rules, folder / "out")
                rows.append(("identifiers", label, found))
        if "bomb" not in skip:
            bomb = folder / "bomb.csv.gz"
            size = write_gzip_bomb(bomb, args.bomb_gib)
            label = f"{args.bomb_gib:g} GiB of zero lines in {size / 1e6:.0f} MB"
            rows.append(("gzip bomb", f"formgate check: {label}", child("cli", str(bomb), str(rules))))
            rows.append(("gzip bomb", f"station worker: {label}",
                         child("worker", str(bomb), str(folder / "station"), "none")))
            bomb.unlink()
        if "largest" not in skip:
            defaults = _settings(folder / "station")
            text_mib = args.text_mib or defaults.max_uncompressed_MB
            most = defaults.max_rows - 1000  # the head's lines and rounding stay within max_rows
            target = text_mib * MIB * 0.98  # just under max_uncompressed_MB
            plain_row = len(_record_text(1000)) / 1000
            wide_row = len(_record_text(1000, wide=240)) / 1000
            wide_rows = int(target / wide_row)
            largest = {
                f"{most:,} rows (max_rows)": {"rows": most},
                f"{most:,} rows with a note column": {
                    "rows": most, "note": max(1, int(target / most - plain_row) - 1)
                },
                f"{wide_rows:,} rows of 244 columns": {"rows": wide_rows, "wide": 240},
            }
            for label, shape in largest.items():
                text = _record_text(**shape)
                path = _gz(text, folder / "big.csv.gz")
                label = f"{label}: {len(text) / MIB:.0f} MiB text, {path.stat().st_size / MIB:.0f} MiB gz"
                del text
                rows.append(("largest within the defaults", label,
                             child("worker", str(path), str(folder / "station"), "all")))
    _print(rows)
    return 0


def _print(rows: list[tuple[str, str, dict[str, Any]]]) -> None:
    print(f"formgate hostile inputs, {os.cpu_count()} cores, Python {sys.version.split()[0]}")
    part = ""
    for name, label, found in rows:
        if name != part:
            part = name
            limits = next((f["limits"] for n, _, f in rows if n == name and "limits" in f), "")
            print(f"\n{name}" + (f" ({limits})" if limits else ""))
            print(f"  {'input':<58} {'command':>8} {'work':>9} {'peak RSS':>9} {'VmPeak':>9}  outcome")
        print(
            f"  {label:<58} {found['command_s']:>7.2f}s {found['work_s']:>8.4f}s "
            f"{found['maxrss_mib']:>6.0f} MiB {found['vmpeak_mib']:>5.0f} MiB  {found['outcome'][:110]}"
        )


if __name__ == "__main__":
    sys.exit(main())
