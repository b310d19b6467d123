"""Safety of what fleetsim writes: output folders, faults, file names, CSV cells, workers.

Sources: CSV injection escaping follows the OWASP "CSV Injection" guidance (from memory:
prefix a text cell starting with ``=``, ``+``, ``-``, ``@``, tab or carriage return with a
single quote); ``RLIMIT_FSIZE`` making a write fail with EFBIG once SIGXFSZ is ignored is
setrlimit(2) (from memory); a killed parent's orphans being handed to another process (so
``os.getppid()`` changes) and ``PR_SET_PDEATHSIG`` are prctl(2) and POSIX (from memory).
Process checks read /proc (Linux).
"""

from __future__ import annotations

import json
import os
import random
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pandas as pd
import pytest
import yaml
from typer.testing import CliRunner

import fleetsim
from fleetsim.cli.app import app
from fleetsim.config import example_path
from fleetsim.errors import FleetsimError
from fleetsim.output import (
    MARKER,
    atomic_folder,
    claim_study,
    clean_leftovers,
    csv_frame,
    escape_cell,
    inside,
    read_marker,
    safe_name,
    unescape_cell,
    write_run,
)
from fleetsim.report import write_report

runner = CliRunner()
TINY = ["--devices", "800", "--days", "0.25"]
WRITE = ["--devices", "3000", "--days", "0.5"]  # an event log of a few hundred kB: a write worth interrupting
STUDY = ["--set", "fleet.devices=800", "--set", "horizon.duration=6h", "--set", "rounds.target_reports=20",
         "--set", "rounds.min_reports=15"]
LINUX = pytest.mark.skipif(not Path("/proc/self/stat").exists(), reason="reads /proc (Linux)")


def _cli(*args: str) -> list[str]:
    return [sys.executable, "-c", "from fleetsim.cli import main; main()", *args]


def _tree(root: Path) -> dict[str, tuple[int, int]]:
    """Every path under ``root`` with its size and modification time (ns)."""
    out = {}
    for path in sorted(root.rglob("*")):
        stat = path.lstat()
        out[str(path.relative_to(root))] = (stat.st_size, stat.st_mtime_ns)
    return out


def _leftovers(target: Path) -> list[str]:
    return sorted(p.name for p in target.parent.iterdir() if p.name.startswith(f".{target.name}."))


# ------------------------------------------------------------------------------ --out rules


@pytest.fixture()
def sandbox(tmp_path, monkeypatch):
    """A home folder and a current folder inside tmp_path, a user folder with a file, a fleet file."""
    home, work = tmp_path / "home", tmp_path / "home" / "projects" / "work"
    work.mkdir(parents=True)
    monkeypatch.setenv("HOME", str(home))
    monkeypatch.chdir(work)
    (tmp_path / "mine").mkdir()
    (tmp_path / "mine" / "thesis.txt").write_text("a user's file\n")
    (tmp_path / "fleets").mkdir()
    shutil.copy(example_path(), tmp_path / "fleets" / "f.yaml")
    (tmp_path / "notes.txt").write_text("a file\n")
    return tmp_path


@pytest.mark.parametrize(
    ("out", "fragment"),
    [
        (".", "is the current folder"),
        ("", "is the current folder"),
        ("..", "is the current folder or one that holds it"),
        ("{tmp}", "is the current folder or one that holds it"),
        ("/", "is the root folder"),
        ("~", "is your home folder"),
        ("{tmp}/home", "is your home folder"),
        ("{tmp}/fleets", "holds the input file"),
        ("{tmp}/mine", "exists and is not a fleetsim output folder; choose a new folder"),
        ("{tmp}/notes.txt", "exists and is not a folder"),
    ],
)
@pytest.mark.parametrize("command", ["run", "sweep", "compare"])
def test_refused_out_is_one_line_and_touches_nothing(sandbox, out, fragment, command):
    out = os.path.expanduser(out.format(tmp=sandbox))
    fleet = str(sandbox / "fleets" / "f.yaml")
    args = {"run": ["run", fleet, *TINY],
            "sweep": ["sweep", fleet, *STUDY, "--vary", "rounds.rest=1h", "--seeds", "1", "--workers", "1"],
            "compare": ["compare", fleet, *STUDY, "--seeds", "1", "--workers", "1"]}[command]
    before = _tree(sandbox)
    result = runner.invoke(app, [*args, "--out", out, "--force"])  # --force never lifts these
    assert result.exit_code == 2, result.output
    lines = result.output.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"error: --out {Path(out)}: "), lines
    assert fragment in lines[0] and "Traceback" not in result.output
    assert _tree(sandbox) == before


def test_a_second_run_needs_force_and_force_replaces_only_ours(tmp_path):
    out = tmp_path / "run"
    assert runner.invoke(app, ["run", "--out", str(out), *TINY]).exit_code == 0
    marker = read_marker(out)
    assert marker is not None and marker["kind"] == "run" and marker["fleetsim"] == fleetsim.__version__
    before = (out / "summary.json").read_bytes()
    again = runner.invoke(app, ["run", "--out", str(out), *TINY, "--seed", "5"])
    assert again.exit_code == 2
    assert again.output.strip() == (f"error: --out {out}: holds an earlier fleetsim run; pass --force to "
                                    "replace it, or choose another folder")
    assert (out / "summary.json").read_bytes() == before
    forced = runner.invoke(app, ["run", "--out", str(out), *TINY, "--seed", "5", "--force"])
    assert forced.exit_code == 0, forced.output
    assert json.loads((out / "summary.json").read_text())["seed"] == 5
    assert _leftovers(out) == []
    # --force replaces only what fleetsim wrote: a file of the user's inside stops it.
    (out / "tables" / "my notes.txt").write_text("keep me\n")
    kept = runner.invoke(app, ["run", "--out", str(out), *TINY, "--seed", "6", "--force"])
    assert kept.exit_code == 2 and kept.output.strip() == (
        f"error: --out {out}: holds files fleetsim did not write (tables/my notes.txt); move them away or "
        "choose another folder")
    assert (out / "tables" / "my notes.txt").read_text() == "keep me\n"
    assert json.loads((out / "summary.json").read_text())["seed"] == 5
    # An empty folder is fine without --force; a study folder of ours needs it.
    (tmp_path / "empty").mkdir()
    assert runner.invoke(app, ["run", "--out", str(tmp_path / "empty"), *TINY]).exit_code == 0
    claim_study(tmp_path / "study", "sweep")
    refused = runner.invoke(app, ["run", "--out", str(tmp_path / "study"), *TINY])
    assert refused.exit_code == 2 and "holds an earlier fleetsim sweep; pass --force" in refused.output


def test_sweep_resumes_in_its_folder_and_replaces_a_run_only_with_force(tmp_path):
    run_dir = tmp_path / "run"
    assert runner.invoke(app, ["run", "--out", str(run_dir), *TINY]).exit_code == 0
    sweep = ["sweep", *STUDY, "--vary", "rounds.rest=1h", "--seeds", "1", "--workers", "1"]
    refused = runner.invoke(app, [*sweep, "--out", str(run_dir)])
    assert refused.exit_code == 2 and "holds an earlier fleetsim run; pass --force" in refused.stderr
    assert (run_dir / "summary.json").exists()
    forced = runner.invoke(app, [*sweep, "--out", str(run_dir), "--force"])
    assert forced.exit_code == 0, forced.output
    assert read_marker(run_dir)["kind"] == "sweep" and not (run_dir / "summary.json").exists()
    again = runner.invoke(app, [*sweep, "--out", str(run_dir)])  # resuming is not replacing
    assert again.exit_code == 0 and "0 run now, 1 reused" in again.stdout
    compare = runner.invoke(app, ["compare", *STUDY, "--seeds", "1", "--workers", "1", "--out", str(run_dir)])
    assert compare.exit_code == 2 and "holds an earlier fleetsim sweep; pass --force" in compare.stderr


def test_report_writes_only_into_a_marked_run_folder(tmp_path):
    run_dir = tmp_path / "run"
    assert runner.invoke(app, ["run", "--out", str(run_dir), *TINY]).exit_code == 0
    copy = tmp_path / "copy"
    shutil.copytree(run_dir, copy)
    (copy / MARKER).unlink()  # a run folder's files, but not one fleetsim wrote there
    study = claim_study(tmp_path / "study", "sweep")
    for folder in (copy, study):
        before = _tree(tmp_path)
        result = runner.invoke(app, ["report", str(folder)])
        assert result.exit_code == 2
        assert result.output.strip() == (f"error: {folder}: not a run folder written by 'fleetsim run' "
                                         f"(no {MARKER} file of kind run); nothing written")
        assert _tree(tmp_path) == before


def test_leftovers_are_removed_only_when_ours_and_older_than_this_process(tmp_path):
    target = tmp_path / "study"
    past = time.time() - 3600
    ours = tmp_path / ".study.partial-abcd_123"
    ours.mkdir()
    (ours / MARKER).write_text('{"kind": "sweep"}')
    (ours / "runs.csv").write_text("x\n")
    empty = tmp_path / ".study.old-zz99zz99"
    empty.mkdir()
    foreign = tmp_path / ".study.partial-qwertyui"  # our naming, but holding a file and no marker
    foreign.mkdir()
    (foreign / "keep.txt").write_text("not ours\n")
    other_name = tmp_path / ".study.partial-toolongname"
    other_name.mkdir()
    fresh = tmp_path / ".study.partial-newnew00"  # made after this process started: maybe a live write
    fresh.mkdir()
    (fresh / MARKER).write_text('{"kind": "sweep"}')
    for path in (ours, empty, foreign, other_name):
        os.utime(path, (past, past))
    lines: list[str] = []
    assert clean_leftovers(target, lines.append) == [empty.name, ours.name]
    assert len(lines) == 1 and "removed 2 leftover temporary folder(s)" in lines[0]
    assert not ours.exists() and not empty.exists()
    assert (foreign / "keep.txt").exists() and other_name.exists() and fresh.exists()


def test_without_an_atomic_swap_the_old_output_is_moved_aside_and_put_back(tmp_path, monkeypatch):
    import fleetsim.output.folders as output

    monkeypatch.setattr(output, "_exchange", lambda a, b: False)  # as on a system without renameat2
    target = tmp_path / "run"
    atomic_folder(target, lambda folder: (folder / "summary.json").write_text("1"))
    atomic_folder(target, lambda folder: (folder / "summary.json").write_text("2"), force=True)
    assert (target / "summary.json").read_text() == "2" and _leftovers(target) == []
    # Killed between its two renames, a write leaves the old output in a marked holder, no target.
    holder = tmp_path / ".run.old-abcdefgh"
    holder.mkdir()
    (holder / MARKER).write_text('{"kind": "old"}')
    os.replace(target, holder / "previous")
    past = time.time() - 3600
    os.utime(holder, (past, past))
    lines: list[str] = []
    assert clean_leftovers(target, lines.append) == [holder.name]
    assert (target / "summary.json").read_text() == "2" and not holder.exists()
    assert len(lines) == 1 and lines[0].endswith("; the previous output was put back")


def test_writes_stay_inside_out_and_names_are_safe_slugs():
    hostile = ["../../evil", "a/b\\c", "", ".", "..", ".hidden", "-rf", "x" * 300, "é", "A", "a", "a_b", "a/b"]
    taken: set[str] = set()
    names = [safe_name(text, taken) for text in hostile]
    for name in names:
        assert name and len(name) <= 100 and not name.startswith((".", "-"))
        assert set(name) <= set("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789-_.")
    assert len({n.casefold() for n in names}) == len(names)  # unique, even on a case-blind disk
    assert safe_name("rounds.committed_per_hour") == "rounds.committed_per_hour"  # safe names stay as they are
    assert safe_name("a/b") != safe_name("a_b")
    with pytest.raises(FleetsimError, match="outside"):
        inside("/tmp/out", "/tmp/out/heatmaps/../../evil.png")
    assert inside("/tmp/out", "/tmp/out/heatmaps/x.png") == Path("/tmp/out/heatmaps/x.png")


# ------------------------------------------------------------------------------ CSV cells


def test_formula_like_text_cells_are_escaped_and_numbers_are_not():
    # OWASP CSV injection guidance (from memory): these first characters start a formula.
    for text in ("=1+1", "+1", "-1", "@SUM(A1)", "\tx", "\rx"):
        assert escape_cell(text) == "'" + text and unescape_cell(escape_cell(text)) == text
    assert escape_cell("'x") == "''x" and unescape_cell("''x") == "'x"  # so reading back is exact
    for value in ("a=b", "tablet", "", -1.5, -3, 0.0, None, True):
        assert escape_cell(value) == value
    frame = pd.DataFrame({
        "name": ["=HYPERLINK(\"x\")", "plain", "-2"],
        "kind": pd.Categorical(["@a", "b", "@a"]),
        "value": [-1.5, 2.0, -3.0],
        "count": [-1, 0, 1],
        "=header": [1, 2, 3],
    })
    out = csv_frame(frame)
    assert list(out["name"]) == ["'=HYPERLINK(\"x\")", "plain", "'-2"]
    assert list(out["kind"].astype(str)) == ["'@a", "b", "'@a"]
    assert list(out.columns) == ["name", "kind", "value", "count", "'=header"]
    pd.testing.assert_series_equal(out["value"], frame["value"])
    pd.testing.assert_series_equal(out["count"], frame["count"])
    assert frame["name"][0] == "=HYPERLINK(\"x\")"  # the caller's frame is not changed


HOSTILE_TYPES = {"budget-phone": "=1+1", "midrange-phone": "<b>x</b>", "flagship-phone": "../../evil/x"}


def _hostile_fleet(tmp_path: Path) -> Path:
    raw = yaml.safe_load(example_path().read_text(encoding="utf-8"))
    types = raw["fleet"]["device_types"]
    for old, new in HOSTILE_TYPES.items():
        types[new] = types.pop(old)
        for region in raw["fleet"]["regions"].values():  # a region's own type mix names types too
            if old in region.get("type_mix", {}):
                region["type_mix"][new] = region["type_mix"].pop(old)
    path = tmp_path / "fleets" / "hostile.yaml"
    path.parent.mkdir()
    path.write_text(yaml.safe_dump(raw, sort_keys=False), encoding="utf-8")
    return path


def test_hostile_names_are_escaped_in_csv_and_literal_in_the_report(tmp_path):
    fleet = _hostile_fleet(tmp_path)
    config = fleetsim.load_config(fleet, ["fleet.devices=3000", "horizon.duration=12h", "rounds.rest=4h"])
    out = write_run(fleetsim.simulate(config, seed=1), tmp_path / "run")
    text = (out / "tables" / "bias_by_device_type.csv").read_text(encoding="utf-8")
    assert "\n'=1+1," in text and "\n<b>x</b>," in text and "\n../../evil/x," in text
    assert "\n=1+1," not in text
    events = pd.read_parquet(out / "events.parquet")
    assert "=1+1" in set(events["device_type"].astype(str))  # Parquet keeps the raw name
    write_report(out)
    markdown = (out / "report.md").read_text(encoding="utf-8")
    page = (out / "report.html").read_text(encoding="utf-8")
    # Markdown escapes its own special characters ("\\+", "\\<"): rendered, the names read literally.
    assert "| =1\\+1 |" in markdown and "'=1" not in markdown and "\\<b\\>x\\</b\\>" in markdown
    assert "=1+1" in page and "'=1+1" not in page and "&#x27;=1+1" not in page
    assert "&lt;b&gt;x&lt;/b&gt;" in page and "<b>x</b>" not in page


def test_hostile_names_make_safe_heat_map_files_inside_out(tmp_path):
    from fleetsim.study import FleetFile, InProcess, parse_axis, run_sweep, write_sweep

    fleet = _hostile_fleet(tmp_path)
    base = FleetFile.read(fleet, ["fleet.devices=800", "horizon.duration=6h", "rounds.target_reports=20",
                                  "rounds.min_reports=15"])
    folder = tmp_path / "deep" / "study"
    result = run_sweep(base, [parse_axis("rounds.rest=1h")], [0], executor=InProcess(), folder=folder)
    # Study columns: the summary path joined with '_' ('-' written '_'; docs/studies.md).
    metrics = [f"bias_by_device_type_{name.replace('-', '_')}_report_share" for name in HOSTILE_TYPES.values()]
    before = set(_tree(tmp_path))
    written = write_sweep(result, folder, heatmaps=metrics)
    new = set(_tree(tmp_path)) - before
    assert new and all(name.startswith("deep/study/") for name in new), sorted(new)
    maps = sorted(p.name for p in (folder / "heatmaps").iterdir())
    assert len(maps) == 3 and all(not m.startswith(".") and "/" not in m and m.endswith(".png") for m in maps)
    assert all(p.resolve().is_relative_to(folder.resolve()) for p in written)
    header = (folder / "runs.csv").read_text(encoding="utf-8").split("\n")[0]
    assert "bias_by_device_type_=1+1_report_share" in header  # inside a name, '=' starts no formula


# ------------------------------------------------------------------------------ faults


LAUNCHER = r"""
import json, os, resource, signal, sys

from fleetsim.cli import main

for line in sys.stdin:
    request = json.loads(line)
    pid = os.fork()
    if pid == 0:
        code = 1
        try:
            os.dup2(os.open(request["stderr"], os.O_WRONLY | os.O_CREAT | os.O_TRUNC), 2)
            os.dup2(os.open(os.devnull, os.O_WRONLY), 1)
            if request["limit"]:
                signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # a write past the limit then fails with EFBIG
                resource.setrlimit(resource.RLIMIT_FSIZE, (request["limit"], request["limit"]))
            sys.argv = ["fleetsim", *request["args"]]
            try:
                main()
                code = 0
            except SystemExit as exc:
                code = exc.code if isinstance(exc.code, int) else 1
        finally:
            sys.stderr.flush()
            os._exit(code)
    print(pid, flush=True)
    print(os.waitpid(pid, 0)[1], flush=True)
"""


class Launcher:
    """A process that has imported fleetsim and forks one ``fleetsim`` command per request, so
    each command is a separate process (killable, with its own limits) without the import time."""

    def __init__(self, folder: Path):
        self.folder = folder
        self.process = subprocess.Popen([sys.executable, "-c", LAUNCHER], stdin=subprocess.PIPE,
                                        stdout=subprocess.PIPE, text=True)
        self.count = 0

    def start(self, *args: str, limit: int = 0) -> tuple[int, Path]:
        self.count += 1
        log = self.folder / f"stderr-{self.count}.txt"
        request = {"args": list(args), "stderr": str(log), "limit": limit}
        self.process.stdin.write(json.dumps(request) + "\n")
        self.process.stdin.flush()
        return int(self.process.stdout.readline()), log

    def wait(self) -> int:
        """The exit code of the last command (negative: killed by that signal)."""
        return os.waitstatus_to_exitcode(int(self.process.stdout.readline()))

    def run(self, *args: str, limit: int = 0) -> tuple[int, list[str]]:
        _, log = self.start(*args, limit=limit)
        code = self.wait()
        return code, log.read_text().splitlines()

    def close(self) -> None:
        self.process.stdin.close()
        self.process.wait(timeout=30)
        self.process.stdout.close()


@pytest.fixture(scope="module")
def launcher(tmp_path_factory):
    if not hasattr(os, "fork"):
        pytest.skip("needs os.fork")
    launcher = Launcher(tmp_path_factory.mktemp("logs"))
    yield launcher
    launcher.close()


def _stamp(folder: Path) -> tuple[int, int] | None:
    try:
        stat = folder.stat()
    except FileNotFoundError:
        return None
    return stat.st_ino, stat.st_mtime_ns


@LINUX
def test_killed_runs_leave_the_old_output_or_the_new_one_and_the_next_run_cleans_up(tmp_path, launcher):
    out = tmp_path / "run"
    config = fleetsim.load_config(example_path(), ["fleet.devices=3000", "horizon.duration=0.5d"])
    result = fleetsim.simulate(config, seed=1)
    started = time.perf_counter()
    write_run(result, out)
    window = time.perf_counter() - started  # how long a write of this size takes: the kills land in it
    old = (out / "summary.json").read_bytes()
    rng = random.Random(20261202)  # the kill points: fixed
    kinds, left = [], []
    hits = 0
    for i in range(5):
        delay = rng.uniform(0.0, max(window, 0.05))
        stamp = _stamp(out)
        pid, log = launcher.start("run", "--out", str(out), *WRITE, "--seed", str(10 + i), "--force")
        deadline = time.monotonic() + 60
        # Until the run starts writing: a temporary folder of its own appears, or the target changes.
        while _alive(pid) and not set(_leftovers(out)) - set(left) and _stamp(out) == stamp:
            assert time.monotonic() < deadline
            time.sleep(0.002)
        time.sleep(delay)
        try:
            os.kill(pid, signal.SIGKILL)
        except ProcessLookupError:
            pass  # the run had ended and been reaped
        code = launcher.wait()
        assert code in (-signal.SIGKILL, 0), log.read_text()
        if left:  # this run started by clearing the last one's leftovers, and said so in one line
            assert f"removed {len(left)} leftover temporary folder(s)" in log.read_text(), (log.read_text(), left)
        now = (out / "summary.json").read_bytes()
        if now == old:
            kinds.append("old")
        else:  # the swap was done: the new output is whole
            summary = json.loads(now)
            assert summary["seed"] == 10 + i and read_marker(out)["kind"] == "run"
            names = {p.name for p in out.iterdir()}
            assert {"events.parquet", "rounds.parquet", "census.parquet", "config.json"} <= names
            old = now
            kinds.append("new")
        left = _leftovers(out)
        hits += bool(left)
    assert hits >= 2, kinds  # most kills hit the write and left a temporary folder
    code, lines = launcher.run("run", "--out", str(out), *WRITE, "--seed", "99", "--force")
    assert code == 0, lines
    notes = [line for line in lines if "leftover" in line]
    assert len(notes) == (1 if left else 0), notes
    assert not left or f"removed {len(left)} leftover temporary folder(s)" in notes[0]
    assert _leftovers(out) == [] and json.loads((out / "summary.json").read_text())["seed"] == 99


def test_a_full_disk_is_one_line_and_leaves_no_partial_output(tmp_path, launcher):
    out = tmp_path / "run"
    assert runner.invoke(app, ["run", "--out", str(out), *WRITE]).exit_code == 0
    old = (out / "summary.json").read_bytes()
    assert (out / "events.parquet").stat().st_size > 64_000
    code, lines = launcher.run("run", "--out", str(out), *WRITE, "--seed", "3", "--force", limit=64_000)
    assert code == 2 and len(lines) == 1, lines
    assert lines[0].startswith(f"error: --out {out}: cannot write (") and "nothing was changed" in lines[0]
    assert (out / "summary.json").read_bytes() == old and _leftovers(out) == []

    study = tmp_path / "study"
    code, lines = launcher.run("sweep", *STUDY, "--vary", "rounds.rest=1h", "--seeds", "1", "--workers", "1",
                               "--out", str(study), limit=20_000)
    assert code == 2 and len(lines) == 1 and lines[0].startswith("error: ") and "cannot write" in lines[0], lines
    assert [p for p in study.rglob("*") if "partial" in p.name] == []


# ------------------------------------------------------------------------------ workers


def _children(pid: int) -> list[int]:
    out = []
    for entry in Path("/proc").iterdir():
        if entry.name.isdigit():
            try:
                fields = (entry / "stat").read_text().rsplit(")", 1)[1].split()
            except OSError:
                continue
            if int(fields[1]) == pid:
                out.append(int(entry.name))
    return out


def _alive(pid: int) -> bool:
    try:
        state = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[0]
    except OSError:
        return False
    return state not in ("Z", "X")  # a zombie has ended; only its exit status is left


def _wait_until_gone(pids: list[int], within_s: float) -> list[int]:
    deadline = time.monotonic() + within_s
    while time.monotonic() < deadline and any(_alive(p) for p in pids):
        time.sleep(0.05)
    return [p for p in pids if _alive(p)]


SLOW_POLICY = """
import os
import time

import numpy as np

from fleetsim.policies import SelectionPolicy


class Slow(SelectionPolicy):
    \"\"\"First-come, but a second per choice: a run that lasts while a test kills its parent.\"\"\"

    name = "slow"
    holds_checkins = False
    window_s = 30.0

    def choose(self, candidates, round, rng):
        # Each worker leaves its pid once it is inside a run (its start-up, death watch
        # included, is over), so the test kills the parent only then.
        marks = os.environ.get("SLOW_POLICY_MARKS")
        if marks:
            open(os.path.join(marks, str(os.getpid())), "w").close()
        time.sleep(1.0)
        return np.arange(min(round.needed, len(candidates.device_type)))
"""


def _env_with(path: Path) -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = os.pathsep.join([str(path), *filter(None, [env.get("PYTHONPATH")])])
    return env


@LINUX
def test_workers_die_when_the_sweep_is_killed(tmp_path):
    (tmp_path / "slow_policy.py").write_text(SLOW_POLICY)
    args = ["sweep", *STUDY, "--set", "selection.policy=slow_policy:Slow", "--vary", "rounds.over_selection=1.1,1.3",
            "--seeds", "1", "--workers", "2", "--out", str(tmp_path / "s")]
    log = tmp_path / "stderr.txt"
    marks = tmp_path / "marks"
    marks.mkdir()
    env = {**_env_with(tmp_path), "SLOW_POLICY_MARKS": str(marks)}
    with log.open("wb") as stderr:
        parent = subprocess.Popen(_cli(*args), stdout=subprocess.DEVNULL, stderr=stderr, env=env)
    workers: list[int] = []
    try:
        # A worker still importing when its parent dies ends only once its start-up runs the
        # death watch; the claim tested here is about workers inside runs.
        deadline = time.monotonic() + 120
        while time.monotonic() < deadline and parent.poll() is None:
            workers = [p for p in _children(parent.pid) if b"spawn_main" in Path(f"/proc/{p}/cmdline").read_bytes()]
            if len(workers) == 2 and {str(p) for p in workers} <= {m.name for m in marks.iterdir()}:
                break
            time.sleep(0.05)
        assert parent.poll() is None and len(workers) == 2, log.read_text()
    finally:
        parent.send_signal(signal.SIGKILL)
        parent.wait()
    assert _wait_until_gone(workers, within_s=3.0) == []


ORPHAN = """
import os
import time

from fleetsim.study.executors import die_with_parent

die_with_parent(os.getppid(), use_prctl=False)
print("ready", flush=True)
time.sleep(60)
"""


@LINUX
def test_the_watch_thread_alone_ends_an_orphan(tmp_path):
    """Without prctl (other systems): the thread notices the new parent id and exits."""
    (tmp_path / "orphan.py").write_text(ORPHAN)
    child_code = "import subprocess, sys, time; subprocess.Popen([sys.executable, sys.argv[1]]); time.sleep(60)"
    child = subprocess.Popen([sys.executable, "-c", child_code, str(tmp_path / "orphan.py")],
                             stdout=subprocess.PIPE, text=True)
    try:
        assert child.stdout.readline().strip() == "ready"
        (grandchild,) = _children(child.pid)
        assert _alive(grandchild)
    finally:
        child.send_signal(signal.SIGKILL)
        child.wait()
        child.stdout.close()
    assert _wait_until_gone([grandchild], within_s=3.0) == []


def test_single_files_are_readable_like_any_other_output_and_honour_the_umask(tmp_path):
    # atomic_text writes through mkstemp, which makes private (0600) files; outputs get the
    # mode open() would give them: 0666 less the umask (POSIX open(2), from memory).
    from fleetsim.output import atomic_text

    old = os.umask(0o022)
    try:
        atomic_text(tmp_path / "study.json", "{}\n")
        os.umask(0o077)
        atomic_text(tmp_path / "private.json", "{}\n")
    finally:
        os.umask(old)
    assert (tmp_path / "study.json").stat().st_mode & 0o777 == 0o644
    assert (tmp_path / "private.json").stat().st_mode & 0o777 == 0o600
