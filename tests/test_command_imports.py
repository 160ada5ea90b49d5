"""Each command imports what it uses, and no more: checked on the modules loaded at its exit.

Every command runs in a fresh process, so what it imports it pays for on every start.
Each test runs one command in a subprocess (the same ``main`` the ``formgate`` script
calls) and reads the names of the modules loaded when it returned; the times these
imports take are the benchmark's to show (benchmarks/run.py), never a test's.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

from pipeline.demo.lots import DEMO_CELLS, demo_file_bytes
from tests.conftest import REPO, RULES_DIR
from tests.station_kit import cycle_file, drop, make_station, running, settled, wait_until

# Runs formgate's main on argv[2:] and writes the names of the loaded modules into argv[1],
# whether the command returned or exited (help, a usage error).
WRAPPER = """
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

# What renders a certificate (WeasyPrint and the libraries under it, the templates, the plots)
RENDERING = ("weasyprint", "pydyf", "tinycss2", "cssselect2", "fontTools", "jinja2", "pipeline.report.certificate",
             "pipeline.report.pdf", "pipeline.report.plots", "pipeline.report.cellcertificate")
# What reads and judges a cycle file (the text reader's pandas and numbers, the measuring)
JUDGING = ("pandas", "pyarrow", "scipy", "pipeline.runner", "pipeline.read.cyclefile", "pipeline.read.convert",
           "pipeline.judge.metrics", "pipeline.judge.segmentation", "pipeline.judge.plateaus")
# What no one-file check of a text file needs: a station, its ledger and mail, other layouts' readers,
# the cluster of a regrade, the demo
NOT_FOR_A_CHECK = ("pipeline.station", "pipeline.ledger", "pipeline.mail", "pipeline.regrade", "pipeline.demo",
                   "pipeline.read.workbook", "pipeline.read.parquet", "python_calamine", "openpyxl", "dask",
                   "distributed", "watchdog", "scipy")


def modules_after(tmp_path: Path, *argv: str) -> tuple[set[str], subprocess.CompletedProcess[str]]:
    """The modules loaded when ``formgate argv`` returned, run in a fresh process."""
    listing = tmp_path / "modules.json"
    run = subprocess.run(
        [sys.executable, "-c", WRAPPER, str(listing), *argv],
        capture_output=True,
        text=True,
        cwd=REPO,
        timeout=300,
        check=False,
    )
    assert listing.exists(), run.stderr[-3000:]
    return set(json.loads(listing.read_text(encoding="utf-8"))), run


def loaded(modules: set[str], names: tuple[str, ...]) -> list[str]:
    """Which of ``names`` (a package counts with its submodules) are among ``modules``."""
    return sorted(m for m in modules if any(m == n or m.startswith(n + ".") for n in names))


def good_file(tmp_path: Path) -> Path:
    path = tmp_path / DEMO_CELLS[0].file_name
    path.write_bytes(demo_file_bytes(DEMO_CELLS[0]))
    return path


def test_check_without_certificates_imports_no_rendering_and_no_station(tmp_path: Path) -> None:
    modules, run = modules_after(tmp_path, "check", "--no-pdf", "--rules", str(RULES_DIR), str(good_file(tmp_path)))
    assert run.returncode == 0, run.stderr[-3000:]
    assert " pass " in run.stdout
    assert loaded(modules, RENDERING) == []
    assert loaded(modules, NOT_FOR_A_CHECK) == []
    # it did read and judge the file
    assert {"pandas", "pipeline.read.cyclefile", "pipeline.judge.metrics"} <= modules


def test_check_without_certificates_writing_results_still_imports_no_rendering(tmp_path: Path) -> None:
    out = tmp_path / "out"
    modules, run = modules_after(
        tmp_path, "check", "--no-pdf", "--rules", str(RULES_DIR), "--out", str(out), str(good_file(tmp_path))
    )
    assert run.returncode == 0, run.stderr[-3000:]
    assert [p.suffix for p in out.rglob("*.*")] == [".json"]
    assert loaded(modules, RENDERING) == []
    assert "pipeline.report.result" in modules


def test_check_with_a_certificate_renders_it_at_once(tmp_path: Path) -> None:
    out = tmp_path / "out"
    modules, run = modules_after(tmp_path, "check", "--rules", str(RULES_DIR), "--out", str(out), str(good_file(tmp_path)))
    assert run.returncode == 0, run.stderr[-3000:]
    assert sorted(p.suffix for p in out.rglob("*.*")) == [".json", ".pdf"]
    assert {"weasyprint", "pipeline.report.pdf"} <= modules
    assert loaded(modules, ("scipy", "pipeline.station", "pipeline.ledger")) == []


def test_judging_a_file_never_imports_scipy(tmp_path: Path) -> None:
    # the judging stack a station's worker imports: SciPy's import cost more than judging a file
    code = (
        "import datetime, pathlib, sys\n"
        "from pipeline.rulebook.book import load_rules_dir\n"
        "from pipeline.runner import judge\n"
        "result = judge(pathlib.Path(sys.argv[1]).read_bytes(), 'cell.csv', load_rules_dir(pathlib.Path(sys.argv[2])),"
        " analysed_at=datetime.datetime(2026, 3, 2, tzinfo=datetime.UTC))\n"
        "assert result.metrics.ica_peaks_v and result.metrics.plateaus\n"
        "print(sorted(m for m in sys.modules if m.split('.')[0] == 'scipy'))\n"
    )
    run = subprocess.run(
        [sys.executable, "-c", code, str(good_file(tmp_path)), str(RULES_DIR)],
        capture_output=True, text=True, cwd=REPO, timeout=300, check=False,
    )
    assert run.returncode == 0, run.stderr[-3000:]
    assert run.stdout.strip() == "[]"


def test_status_imports_neither_the_judging_nor_the_rendering_stack(tmp_path: Path) -> None:
    s = make_station(tmp_path / "station")
    with running(s):
        drop(s.inboxes[0].folder, "good.csv", cycle_file("C-1"))
        drop(s.inboxes[0].folder, "low.csv", cycle_file("C-2", capacity_ah=1.5, seed=1))
        wait_until(lambda: settled(s, 2), what="both files")
    modules, run = modules_after(tmp_path, "status", str(s.root))
    assert run.returncode == 0, run.stderr[-3000:]
    # the report read the ledger: the cells, the failed one waiting for a person
    assert "waiting for a person: 1 cell(s)" in run.stdout
    assert "C-2  lot LOT-A  fail" in run.stdout
    assert loaded(modules, RENDERING) == []
    assert loaded(modules, JUDGING) == []


def test_help_imports_only_the_command_line(tmp_path: Path) -> None:
    modules, run = modules_after(tmp_path, "--help")
    assert run.returncode == 0, run.stderr[-3000:]
    assert "status" in run.stdout and "check" in run.stdout
    assert loaded(modules, RENDERING + JUDGING + ("pipeline.station", "pipeline.ledger", "pipeline.mail")) == []


def test_a_command_loads_only_its_own_family_of_commands(tmp_path: Path) -> None:
    modules, run = modules_after(tmp_path, "status", "--help")
    assert run.returncode == 0, run.stderr[-3000:]
    families = loaded(modules, ("pipeline.cli",))
    assert families == ["pipeline.cli", "pipeline.cli.exits", "pipeline.cli.main", "pipeline.cli.starting", "pipeline.cli.station"]


def test_a_command_run_as_the_program_keeps_its_imports_out_of_the_collectors_way(tmp_path: Path) -> None:
    # formgate's script calls main() without arguments: the process runs that one command
    code = (
        "import gc, sys\n"
        "from pipeline.cli.main import main\n"
        "code = main()\n"
        "print('collector on:', gc.isenabled(), 'frozen:', gc.get_freeze_count() > 1000)\n"
        "sys.exit(code)\n"
    )
    run = subprocess.run(
        [sys.executable, "-c", code, "check", "--no-pdf", "--rules", str(RULES_DIR), str(good_file(tmp_path))],
        capture_output=True, text=True, cwd=REPO, timeout=300, check=False,
    )
    assert run.returncode == 0, run.stderr[-3000:]
    assert run.stdout.splitlines()[-1] == "collector on: True frozen: True"


def test_a_command_called_from_python_leaves_the_collector_alone(tmp_path: Path) -> None:
    import gc

    from pipeline.cli.main import main

    frozen = gc.get_freeze_count()
    assert main(["check", "--no-pdf", "--rules", str(RULES_DIR), str(good_file(tmp_path))]) == 0
    assert gc.isenabled()
    # nothing frozen by the command (a freeze moves some 100,000 objects); a frozen object
    # that is freed meanwhile leaves the count, so it may only go down
    assert gc.get_freeze_count() <= frozen
