"""The commit protocol: a kill at any step leaves the old or the new result whole, with
reports that belong to the store, and the next run, update, check or inspect recovers.

Kills are injected, never timed: a child process dies (``os._exit``) before or after the
k-th rename of a commit, for every k; the named hook points of
:mod:`rowfold.storage.commit` raise in this process or end a child at every step; and one
child is SIGKILLed while paused at the commit point. After each, the test reads the files
on disk: the store's tag and commit id must equal the reports' (README, "Writing is
atomic").
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path
from typing import Any

import h5py
import numpy as np
import pytest
import yaml
import zarr

from rowfold import testhooks
from rowfold.cli import main
from rowfold.storage import ResultWriter, read_result, report_paths, write_arrays


def remove_entry(path: Path) -> None:
    import shutil

    if path.is_dir() and not path.is_symlink():
        shutil.rmtree(path)
    else:
        path.unlink()


HOOK = "ROWFOLD_TEST_HOOK"
READY = "ROWFOLD_TEST_HOOK_READY"


@pytest.fixture(autouse=True)
def fresh_hooks() -> Any:
    testhooks.reset()
    yield
    testhooks.reset()


@pytest.fixture(params=[".h5", ".zarr"])
def out(request: pytest.FixtureRequest, tmp_path: Path) -> Path:
    return tmp_path / f"result{request.param}"


# The writer's part of a commit, as a child process runs it: R = scale * I, the tag in the
# store's attributes and in both reports. It uses only what every version of ResultWriter
# offers, so the same child shows what the code before this protocol did.
FILL = """
def fill(writer, tag, scale):
    from rowfold.storage import report_paths
    writer.put("R", scale * np.eye(3))
    writer.create("Q", (40, 3), np.dtype("<f8"), 8)
    for start in range(0, 40, 8):
        writer.write_rows("Q", start, np.full((8, 3), scale))
    writer.set_attrs({"method": tag})
    json_path, html_path = report_paths(writer.path)
    commit_id = getattr(writer, "commit_id", None)  # None before the commit protocol
    writer.add_file(json_path, json.dumps({"tag": tag, "commit": commit_id}))
    writer.add_file(html_path, f"<html><p>{tag}</p></html>")
"""
exec(compile("import json\nimport numpy as np\n" + FILL, "fill", "exec"))


def commit(out: Path, tag: str, scale: float) -> None:
    with ResultWriter(out) as writer:
        fill(writer, tag, scale)  # type: ignore[name-defined]  # noqa: F821
        writer.commit()


def store_attrs(path: Path) -> dict[str, Any]:
    if path.suffix == ".h5":
        with h5py.File(path, "r") as handle:
            return {k: (v.decode() if isinstance(v, bytes) else v) for k, v in handle.attrs.items()}
    return dict(zarr.open_group(str(path), mode="r").attrs)


def whole(out: Path) -> str:
    """The tag of the result at ``out`` after checking that store and reports agree."""
    assert out.exists(), f"{out.name} is missing"
    attrs = store_attrs(out)
    json_path, html_path = report_paths(out)
    report = json.loads(json_path.read_text())
    tag = attrs["method"]
    assert report["tag"] == tag, f"store is {tag!r}, JSON report is {report['tag']!r}"
    assert f"<p>{tag}</p>" in html_path.read_text(), "HTML report belongs to another commit"
    if report.get("commit") is not None:
        assert attrs.get("rowfold_commit") == report["commit"]
    R = read_result(out)["R"]
    scale = {"old": 1.0, "new": 2.0}[tag]
    assert np.array_equal(R, scale * np.eye(3)), "R does not match the tag"
    return str(tag)


def leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if p.name.startswith(".rowfold-"))


# ------------------------------------------------------------ kills at every rename

CHILD = (
    textwrap.dedent(
        """
    import json, os, sys
    from pathlib import Path
    import numpy as np
    out, die_before, die_after = Path(sys.argv[1]), int(sys.argv[2]), int(sys.argv[3])
    calls = 0

    def counted(real):
        def rename(src, dst, *args, **kwargs):
            global calls
            calls += 1
            if calls == die_before:
                os._exit(17)
            real(src, dst, *args, **kwargs)
            if calls == die_after:
                os._exit(17)
        return rename

    os.replace, os.rename = counted(os.replace), counted(os.rename)
    from rowfold.storage import ResultWriter
    """
    )
    + FILL
    + textwrap.dedent(
        """
    with ResultWriter(out) as writer:
        fill(writer, "new", 2.0)
        writer.commit()
    print(calls)
    """
    )
)


def child_commit(
    out: Path, die_before: int = 0, die_after: int = 0
) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-c", CHILD, str(out), str(die_before), str(die_after)],
        capture_output=True,
        text=True,
        timeout=120,
    )


def test_kill_before_and_after_every_rename_of_a_commit(out: Path) -> None:
    """For every rename k of a commit: die just before it and just after it. Then
    ``rowfold inspect`` (which recovers) must find the old or the new result whole, its
    reports matching, nothing left beside it, and a next commit must work."""
    commit(out, "old", 1.0)
    done = child_commit(out)
    assert done.returncode == 0, done.stderr
    renames = int(done.stdout.split()[-1])
    assert renames >= 3, "a commit renames the store and its two reports at least"
    assert whole(out) == "new"
    seen, problems = set(), []
    for k in range(1, renames + 1):
        for before, after in ((k, 0), (0, k)):
            commit(out, "old", 1.0)
            killed = child_commit(out, before, after)
            assert killed.returncode == 17, killed.stderr
            where = f"killed {'before' if before else 'after'} rename {k}"
            main(["--quiet", "inspect", str(out)])
            try:
                seen.add(whole(out))
            except (AssertionError, OSError, KeyError) as exc:
                problems.append(f"{where}: {exc}".splitlines()[0])
                continue
            if leftovers(out.parent):
                problems.append(f"{where}: left {leftovers(out.parent)}")
                for name in leftovers(out.parent):
                    remove_entry(out.parent / name)
    assert problems == []
    assert seen == {"old", "new"}
    commit(out, "old", 1.0)
    assert whole(out) == "old"


# ------------------------------------------------------------ the named steps


def commit_steps(out: Path, monkeypatch: pytest.MonkeyPatch) -> list[str]:
    """The hook points one commit over an earlier result passes, in order."""
    commit(out, "old", 1.0)
    steps: list[str] = []
    original = testhooks.reached
    monkeypatch.setattr(testhooks, "reached", lambda point: steps.append(point))
    commit(out, "new", 2.0)
    monkeypatch.setattr(testhooks, "reached", original)
    return [step for step in steps if step.startswith("commit:")]


def test_commit_passes_every_documented_step(out: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    steps = commit_steps(out, monkeypatch)
    names = [out.name, "result.report.json", "result.report.html"]
    expected = ["commit:staged", "commit:synced", "commit:journal-written", "commit:journal"]
    if out.suffix == ".zarr":
        expected.append(f"commit:aside:{out.name}")
    expected += [f"commit:install:{name}" for name in names]
    expected += ["commit:installed", "commit:finished"]
    assert steps == expected


def assert_recoverable(out: Path, past_commit_point: bool) -> None:
    """Before recovery: before the commit point no journal and the old result whole; after
    it a journal whose staged and installed parts together make the new result, or (once
    the journal is removed) the new result whole."""
    stages = [p for p in out.parent.iterdir() if p.name.startswith(".rowfold-stage-")]
    journals = [p / "journal.json" for p in stages if (p / "journal.json").exists()]
    if not past_commit_point:
        assert journals == []
        assert whole(out) == "old"
        return
    if not journals:
        assert whole(out) == "new"
        return
    assert len(journals) == 1
    journal = json.loads(journals[0].read_text())
    for part in journal["parts"]:
        staged = journals[0].parent / "new" / part["name"]
        assert staged.exists() or (out.parent / part["name"]).exists(), part["name"]


@pytest.mark.parametrize("mode", ["raise", "exit"])
def test_fault_at_every_named_step_then_next_run_recovers(
    out: Path, monkeypatch: pytest.MonkeyPatch, mode: str
) -> None:
    """``raise``: the step raises in this process; ``exit``: a child ends at the step
    (``os._exit``, no clean-up). Before the commit point the old result stays; from it on,
    recovery completes the new one."""
    steps = commit_steps(out, monkeypatch)
    point = steps.index("commit:journal")
    for index, step in enumerate(steps):
        commit(out, "old", 1.0)
        testhooks.reset()
        if mode == "raise":
            monkeypatch.setenv(HOOK, f"{step}=raise")
            with pytest.raises(testhooks.InjectedFaultError):
                commit(out, "new", 2.0)
            monkeypatch.delenv(HOOK)
        else:
            env = {**os.environ, HOOK: f"{step}=exit"}
            killed = subprocess.run(
                [sys.executable, "-c", CHILD, str(out), "0", "0"], env=env, capture_output=True
            )
            assert killed.returncode == testhooks.EXIT_STATUS, killed.stderr
        assert_recoverable(out, past_commit_point=index >= point)
        recover_output_under_lock(out)
        assert whole(out) == ("new" if index >= point else "old"), step
        assert leftovers(out.parent) == [], step
    commit(out, "old", 1.0)
    assert whole(out) == "old"


def recover_output_under_lock(out: Path) -> None:
    from rowfold.storage import claim_output

    with claim_output(out):  # takes the lock and recovers
        pass


RECOVER_CHILD = textwrap.dedent(
    """
    import os, sys
    from pathlib import Path
    out, die_after = Path(sys.argv[1]), int(sys.argv[2])
    calls = 0

    def counted(real):
        def rename(src, dst, *args, **kwargs):
            global calls
            real(src, dst, *args, **kwargs)
            calls += 1
            if calls == die_after:
                os._exit(17)
        return rename

    os.replace, os.rename = counted(os.replace), counted(os.rename)
    from rowfold.storage import claim_output
    with claim_output(out):
        pass
    print(calls)
    """
)


def test_a_recovery_killed_after_any_of_its_renames_is_completed_by_the_next(
    out: Path,
) -> None:
    """Recovery replays the journal's renames; killed after its k-th one (for every k), the
    next recovery must still complete the same commit."""
    env = {**os.environ, HOOK: "commit:journal=exit"}

    def interrupted_commit() -> None:
        commit(out, "old", 1.0)
        killed = subprocess.run(
            [sys.executable, "-c", CHILD, str(out), "0", "0"], env=env, capture_output=True
        )
        assert killed.returncode == testhooks.EXIT_STATUS, killed.stderr

    def recovering_child(die_after: int) -> subprocess.CompletedProcess[str]:
        return subprocess.run(
            [sys.executable, "-c", RECOVER_CHILD, str(out), str(die_after)],
            capture_output=True,
            text=True,
            timeout=120,
        )

    interrupted_commit()
    done = recovering_child(0)
    assert done.returncode == 0, done.stderr
    renames = int(done.stdout.split()[-1])
    assert renames >= 3, "recovery installs the store and its two reports"
    assert whole(out) == "new"
    for k in range(1, renames + 1):
        interrupted_commit()
        assert recovering_child(k).returncode == 17
        recover_output_under_lock(out)
        assert whole(out) == "new", f"recovery killed after its rename {k}"
        assert leftovers(out.parent) == [], k


def test_recovery_refuses_a_damaged_staged_part(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """A journal whose staged part lost bytes is neither completed nor deleted."""
    out = tmp_path / "result.h5"
    commit(out, "old", 1.0)
    monkeypatch.setenv(HOOK, "commit:journal=raise")
    with pytest.raises(testhooks.InjectedFaultError):
        commit(out, "new", 2.0)
    (stage,) = [p for p in tmp_path.iterdir() if p.name.startswith(".rowfold-stage-")]
    staged = stage / "new" / "result.report.json"
    staged.write_text(staged.read_text()[:5])
    from rowfold.errors import OutputError
    from rowfold.storage import recover_output

    with pytest.raises(OutputError, match="cannot be completed"):
        recover_output(out)
    assert stage.exists() and (stage / "journal.json").exists()
    assert whole(out) == "old"


def test_a_damaged_commit_is_named_by_inspect_and_refused_by_a_run(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """inspect still describes the old result and names the staging folder in a note; a
    run exits 2 naming it and touches nothing."""
    job = write_job(tmp_path, ".h5")
    out = tmp_path / "out.h5"
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    old_id = cli_whole(out)
    monkeypatch.setenv(HOOK, "commit:journal=raise")
    assert main(["--quiet", "run", str(job), "--inline"]) == 4
    monkeypatch.delenv(HOOK)
    (stage,) = [p for p in tmp_path.iterdir() if p.name.startswith(".rowfold-stage-")]
    (stage / "new" / "out.report.json").write_text("{")
    capsys.readouterr()
    assert main(["inspect", str(out)]) == 0
    captured = capsys.readouterr()
    assert stage.name in captured.err and "cannot be completed" in captured.err, captured.err
    assert old_id in captured.out
    assert main(["--quiet", "run", str(job), "--inline"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and stage.name in err[0], err
    assert cli_whole(out) == old_id and (stage / "journal.json").exists()


# ------------------------------------------------------------ through the command line


def write_job(folder: Path, suffix: str, q: bool = True) -> Path:
    rng = np.random.default_rng(3)
    A = rng.standard_normal((400, 5))
    write_arrays(folder / "in.h5", {"A": A, "b": A @ np.ones(5)}, chunk_rows=50)
    job = {
        "input": {"path": "in.h5", "matrix": "A", "rhs": "b", "rows_per_block": 100},
        "method": {"name": "cholqr2"},
        "output": {"path": f"out{suffix}", "overwrite": True, "q": q},
    }
    path = folder / "job.yaml"
    path.write_text(yaml.safe_dump(job), encoding="utf-8")
    return path


def cli(folder: Path, *args: str, env: dict[str, str] | None = None, **kw: Any) -> Any:
    return subprocess.Popen(
        [sys.executable, "-m", "rowfold", "--quiet", *args],
        cwd=folder,
        env={**os.environ, **(env or {})},
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        start_new_session=True,
        **kw,
    )


def cli_whole(out: Path) -> str:
    """The commit id of a result written by ``rowfold run``, after checking its reports."""
    commit_id = store_attrs(out)["rowfold_commit"]
    json_path, html_path = report_paths(out)
    assert json.loads(json_path.read_text())["commit"] == commit_id
    assert commit_id in html_path.read_text()
    return str(commit_id)


@pytest.mark.parametrize("verb", ["run", "update", "check", "inspect"])
def test_killed_between_the_renames_of_a_zarr_swap_is_completed_by_the_next_verb(
    tmp_path: Path, verb: str
) -> None:
    """The kill the old protocol lost a result to: after setting the old Zarr store aside,
    before renaming the new one in. The next run, update, check or inspect completes it."""
    job = write_job(tmp_path, ".zarr")
    out = tmp_path / "out.zarr"
    first = cli(tmp_path, "run", str(job), "--inline")
    assert first.wait(120) == 0, first.stderr.read() if first.stderr else ""
    old_id = cli_whole(out)
    crashed = cli(tmp_path, "run", str(job), "--inline", env={HOOK: "commit:aside:out.zarr=exit"})
    assert crashed.wait(120) == testhooks.EXIT_STATUS
    assert not out.exists()  # the moment the old protocol's clean-up deleted the old copy
    args = [verb, str(out)] if verb == "inspect" else [verb, str(job)]
    if verb == "run":
        args.append("--inline")
    status = main(["--quiet", *args])
    assert status == 0
    new_id = cli_whole(out)
    assert new_id != old_id
    assert leftovers(tmp_path) == []


def test_sigkill_at_the_commit_point_rolls_forward(tmp_path: Path) -> None:
    """A real SIGKILL of a run paused right after its journal: the next run first
    completes that commit (visible to inspect), then commits its own."""
    job = write_job(tmp_path, ".h5")
    out = tmp_path / "out.h5"
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    old_id = cli_whole(out)
    ready = tmp_path / "paused"
    proc = cli(
        tmp_path, "run", str(job), "--inline", env={HOOK: "commit:journal=pause", READY: str(ready)}
    )
    try:
        deadline = time.monotonic() + 120
        while not ready.exists() and proc.poll() is None and time.monotonic() < deadline:
            time.sleep(0.02)
        assert ready.exists(), proc.stderr.read() if proc.stderr else ""
        os.killpg(proc.pid, signal.SIGKILL)
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGKILL)
        proc.wait(30)
    assert cli_whole(out) == old_id  # nothing renamed yet: store and reports still agree
    assert main(["--quiet", "inspect", str(out)]) == 0
    rolled = cli_whole(out)
    assert rolled != old_id
    assert leftovers(tmp_path) == []
    assert main(["--quiet", "run", str(job), "--inline"]) == 0
    assert cli_whole(out) not in (old_id, rolled)
