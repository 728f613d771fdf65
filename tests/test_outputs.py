"""Ownership of output folders: --force never deletes what discover did not write.

Every case of issue 10 part 1 and 5 is reproduced here with a trivial writer (the
rename sequence does not depend on what is written), plus end-to-end runs of the
command. The rules are the project's own (DESIGN.md, "Outputs are owned"); the
atomic-rename idiom is POSIX rename(2) semantics (common practice).
"""

from __future__ import annotations

import os
import stat
import subprocess
import sys
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from discover.exceptions import OutputError
from discover.outputs import MARKER, OutputClaim, check_target, is_discover_output, write_marker

ROOT = Path(__file__).resolve().parents[1]


def snapshot(folder):
    """Every file under folder with its bytes (hidden files of discover's lock excluded)."""
    files = {}
    for path in Path(folder).rglob("*"):
        if path.is_file() and not path.name.endswith(".discover-lock"):
            files[str(path.relative_to(folder))] = path.read_bytes()
    return files


def write_result(text):
    def write(folder):
        (folder / "model.json").write_text(text)
    return write


def publish(target, text="new", *, force=False, inputs=()):
    with OutputClaim(target, force=force, inputs=inputs) as claim:
        return claim.publish(write_result(text))


@pytest.fixture
def workdir(tmp_path, monkeypatch):
    work = tmp_path / "project"
    (work / "data").mkdir(parents=True)
    (work / "data" / "run1.csv").write_text("t,x\n0,1\n")
    (work / "base.toml").write_text("seed = 1\n")
    monkeypatch.chdir(work)
    return work


def test_new_folder_carries_the_marker_and_normal_permissions(workdir):
    out = publish("out/ship")
    assert is_discover_output(out) and (out / "model.json").read_text() == "new"
    mode = stat.S_IMODE(os.stat(out).st_mode)
    umask = os.umask(0)
    os.umask(umask)
    assert mode == 0o777 & ~umask  # not 0700 as mkdtemp would give
    assert sorted(p.name for p in out.parent.iterdir()) == ["ship"]  # no lock or staging left


def test_force_replaces_an_earlier_output(workdir):
    publish("out/ship", "old")
    with pytest.raises(OutputError, match="exists already. Pass --force"):
        publish("out/ship", "new")
    assert (workdir / "out/ship/model.json").read_text() == "old"
    publish("out/ship", "new", force=True)
    assert (workdir / "out/ship/model.json").read_text() == "new"


@pytest.mark.parametrize("make, why", [
    (lambda w: w / "data", "not written by discover"),                    # a folder of input CSVs
    (lambda w: w, "working directory"),                                  # [output].dir = "."
    (lambda w: w.parent, "working directory or a folder above it"),      # --out ..
    (lambda w: Path("/"), "working directory or a folder above it"),     # --out /
    (lambda w: w / "data" / "run1.csv", "not a folder"),                 # --out precious.csv
])
def test_force_refuses_what_discover_did_not_write(workdir, make, why):
    before = snapshot(workdir.parent)
    with pytest.raises(OutputError, match=why):
        publish(make(workdir), force=True)
    assert snapshot(workdir.parent) == before
    assert not list(workdir.parent.glob("**/.*old-*")) and not list(workdir.parent.glob("**/.*incomplete-*"))


def test_force_refuses_a_marked_folder_that_holds_an_input(workdir):
    out = publish("out/ship")
    (out / "run9.csv").write_text("t,x\n0,2\n")
    with pytest.raises(OutputError, match="holds an input of this run"):
        publish("out/ship", force=True, inputs=[out / "run9.csv"])
    assert (out / "run9.csv").exists()


def test_target_under_a_regular_file_is_refused_before_any_work(workdir):
    (workdir / "notes.txt").write_text("mine")
    with pytest.raises(OutputError, match="is a file, not a folder"):
        check_target("notes.txt/out", force=False)
    assert (workdir / "notes.txt").read_text() == "mine"


def test_symbolic_link_is_refused(workdir):
    os.symlink(workdir / "data", workdir / "link")
    with pytest.raises(OutputError, match="symbolic link"):
        publish("link", force=True)
    assert (workdir / "data" / "run1.csv").exists()


def test_concurrent_run_to_the_same_target_is_refused(workdir):
    with OutputClaim("out/ship", force=False):
        with pytest.raises(OutputError, match="another discover run is writing"):
            OutputClaim("out/ship", force=False)


def test_second_run_to_a_new_target_does_not_silently_replace_the_first(workdir):
    # Both start while the folder does not exist; the first publishes, the second must refuse.
    first, second = OutputClaim("out/ship", force=False), None
    first.publish(write_result("first"))
    first.release()
    with pytest.raises(OutputError, match="exists already"):
        second = OutputClaim("out/ship", force=False)
        second.publish(write_result("second"))
    assert (workdir / "out/ship/model.json").read_text() == "first"


def test_stale_staging_of_a_killed_run_is_removed_and_an_aside_result_put_back(workdir):
    (workdir / "out").mkdir()
    dead = workdir / "out" / ".ship.incomplete-dead"
    dead.mkdir()
    write_marker(dead)
    foreign = workdir / "out" / ".ship.incomplete-notours"  # no marker: not ours, left alone
    foreign.mkdir()
    aside = workdir / "out" / ".ship.old-1234"  # a swap cut between its two renames
    aside.mkdir()
    (aside / "model.json").write_text("previous")
    write_marker(aside, listing=True)
    with OutputClaim("out/ship", force=True) as claim:
        assert not dead.exists() and foreign.exists()
        assert (workdir / "out/ship/model.json").read_text() == "previous"  # put back at once
        claim.publish(write_result("new"))
    assert (workdir / "out/ship/model.json").read_text() == "new"


def _failing(real, n):
    """A stand-in for a filesystem call that raises on its n-th use."""
    calls = {"count": 0}

    def call(*args, **kwargs):
        calls["count"] += 1
        if calls["count"] == n:
            raise OSError(28, "No space left on device (injected)")
        return real(*args, **kwargs)
    return call


@pytest.mark.parametrize("name", ["rename", "mkdir", "write_text", "rmtree"])
@pytest.mark.parametrize("n", [1, 2, 3])
def test_fault_at_every_step_of_the_rename_sequence(workdir, monkeypatch, name, n):
    import shutil

    publish("out/ship", "previous")
    owner = {"rename": os, "rmtree": shutil, "mkdir": Path, "write_text": Path}[name]
    monkeypatch.setattr(owner, name, _failing(getattr(owner, name), n))
    try:
        publish("out/ship", "new", force=True)
    except OutputError as err:
        message = str(err)
        monkeypatch.undo()
        text = (workdir / "out/ship/model.json").read_text()
        # Either the previous result is intact at its own path, or the message says where it is.
        assert text == "previous" or "intact at" in message
        return
    monkeypatch.undo()
    assert (workdir / "out/ship/model.json").read_text() in ("new", "previous")
    assert is_discover_output(workdir / "out/ship")


def test_interrupt_while_writing_keeps_the_previous_result(workdir):
    publish("out/ship", "previous")

    def interrupted(folder):
        (folder / "model.json").write_text("half")
        raise KeyboardInterrupt

    with pytest.raises(KeyboardInterrupt):
        with OutputClaim("out/ship", force=True) as claim:
            claim.publish(interrupted)
    assert (workdir / "out/ship/model.json").read_text() == "previous"
    assert sorted(p.name for p in (workdir / "out").iterdir()) == ["ship"]


PLACES = ["out/a", "out", "data", "data/run1.csv", ".", "..", "base.toml", "notes", "notes/deep/x", "keep"]


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(place=st.sampled_from(PLACES), force=st.booleans(), earlier=st.booleans(),
       foreign=st.sampled_from([None, "notes", "keep"]))
def test_property_no_file_discover_did_not_write_is_touched(tmp_path_factory, place, force, earlier, foreign):
    root = tmp_path_factory.mktemp("layout")
    work = root / "project"
    (work / "data").mkdir(parents=True)
    (work / "data" / "run1.csv").write_text("t,x\n0,1\n")
    (work / "base.toml").write_text("seed = 1\n")
    (root / "sibling.txt").write_text("outside")
    if foreign:
        (work / foreign).mkdir()
        (work / foreign / "mine.txt").write_text("user data")
    cwd = os.getcwd()
    os.chdir(work)
    try:
        if earlier:
            try:
                publish(place, "earlier", force=False, inputs=[work / "data/run1.csv", work / "base.toml"])
            except OutputError:
                pass
        ours = {str(p.relative_to(root)) for p in root.rglob("*") if p.is_file()
                and any(is_discover_output(parent) for parent in p.parents)}
        before = {k: v for k, v in snapshot(root).items() if k not in ours}
        try:
            publish(place, "new", force=force, inputs=[work / "data/run1.csv", work / "base.toml"])
        except OutputError:
            pass
        after = snapshot(root)
        for name, content in before.items():
            assert after.get(name) == content, f"{name} was changed or removed"
    finally:
        os.chdir(cwd)


def test_cli_force_on_a_data_folder_exits_with_one_line_and_keeps_the_data(tmp_path):
    data = tmp_path / "ship"
    data.mkdir()
    for f in (ROOT / "data_demo" / "ship").glob("*.csv"):
        (data / f.name).write_bytes(f.read_bytes())
    config = tmp_path / "base.toml"
    text = (ROOT / "configs" / "ship.toml").read_text()
    config.write_text(text.replace("../data_demo/ship/*.csv", "ship/*.csv").replace('dir = "../out/ship"', ""))
    before = snapshot(data)
    proc = subprocess.run([sys.executable, "-m", "discover", "run", str(config), "--out", str(data), "--force"],
                          capture_output=True, text=True, cwd=tmp_path, timeout=120)
    assert proc.returncode == 6
    assert "not written by discover" in proc.stderr and "Traceback" not in proc.stderr
    assert len(proc.stderr.strip().splitlines()) == 1
    assert snapshot(data) == before


def test_marker_is_in_every_run_output(tmp_path):
    from discover import run, write_outputs

    result = run(ROOT / "configs" / "ship.toml")
    out = write_outputs(result, tmp_path / "ship")
    assert (out / MARKER).is_file() and is_discover_output(out)


def test_force_refuses_an_earlier_output_holding_files_discover_did_not_write(workdir):
    # A user's notes or a mounted/linked folder inside an earlier output must survive --force.
    out = publish("out/ship", "old")
    (out / "notes.txt").write_text("my notes")
    with pytest.raises(OutputError, match="holds notes.txt, which discover did not write"):
        publish("out/ship", force=True)
    assert (out / "notes.txt").read_text() == "my notes"
    (out / "notes.txt").unlink()
    os.symlink(workdir / "data", out / "linked")
    with pytest.raises(OutputError, match="holds linked, which discover did not write"):
        publish("out/ship", force=True)
    assert (workdir / "data" / "run1.csv").exists()
    (out / "linked").unlink()
    publish("out/ship", "new", force=True)  # only what discover wrote: replaced
    assert (out / "model.json").read_text() == "new"
