"""Output folders under real kills, concurrent runs, stale debris; safe folder names.

The kill tests run a small writer in a subprocess (isoscope.folders alone, without the JAX
import, so that many runs are cheap), kill it with SIGKILL at random instants and at the
named steps of the switch (the test-only ISOSCOPE_TEST_PAUSE hook), and check after every kill
that the result folder is either the previous complete result or the new complete one.
"""

import json
import os
import random
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest

from isoscope import folders
from isoscope.errors import InputError

SRC = Path(__file__).resolve().parents[1] / "src"
FILES = 12

WRITER = f"""
import sys, time, types
pkg = types.ModuleType("isoscope"); pkg.__path__ = [{str(SRC / "isoscope")!r}]
sys.modules["isoscope"] = pkg
from isoscope import folders
target, tag = sys.argv[1], sys.argv[2]
r = folders.reserve(target)
for i in range({FILES}):
    (r.folder / f"part{{i}}.txt").write_text(tag)
    time.sleep(0.003)
(r.folder / "result.json").write_text(tag)
r.commit()
"""


def _writer(target, tag, pause=None):
    env = {**os.environ, "PYTHONPATH": str(SRC)}
    env.pop(folders._PAUSE_ENV, None)
    if pause:
        env[folders._PAUSE_ENV] = pause
    return subprocess.Popen(
        [sys.executable, "-c", WRITER, str(target), tag],
        env=env,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )


def _complete_tag(target: Path):
    """The tag of the complete result at ``target``, or None if absent; fails if half-written."""
    if not os.path.lexists(target):
        return None
    assert target.is_dir(), f"{target} dangles"
    assert (target / folders.MARKER).exists(), f"{target} has no marker"
    tags = {(target / f"part{i}.txt").read_text() for i in range(FILES)}
    tags.add((target / "result.json").read_text())
    assert len(tags) == 1, f"{target} mixes runs: {tags}"
    return tags.pop()


def _debris(target: Path):
    keep = {target.name, f".{target.name}.lock"}
    if target.is_symlink():
        keep.add(os.readlink(target))
    return sorted(p.name for p in target.parent.iterdir() if p.name not in keep)


def test_sigkill_at_any_instant_leaves_a_complete_result(tmp_path):
    target = tmp_path / "res"
    assert _writer(target, "first").wait() == 0
    previous = _complete_tag(target)
    assert previous == "first"
    rng = random.Random(8)
    steps = ["linked:5", "switched:5"]
    for k in range(36):
        pause = steps[k % 2] if k < 8 else None
        p = _writer(target, f"run{k}", pause)
        if pause:
            time.sleep(0.5)  # inside the pause (the import takes well under that)
        else:
            time.sleep(rng.uniform(0.0, 0.15))
        p.send_signal(signal.SIGKILL)
        p.wait()
        now = _complete_tag(target)
        # the previous complete result or the new complete one; never nothing, never a mix
        assert now in (previous, f"run{k}"), now
        previous = now
    # a finished run cleans the debris of the killed ones (their pids are dead)
    assert _writer(target, "last").wait() == 0
    assert _complete_tag(target) == "last"
    assert _debris(target) == []


def test_two_concurrent_runs_both_succeed_without_debris(tmp_path):
    target = tmp_path / "res"
    a = _writer(target, "a", pause="linked:0.6")
    time.sleep(0.3)
    b = _writer(target, "b")
    outs = [p.communicate() for p in (a, b)]
    assert a.returncode == 0 and b.returncode == 0, outs
    assert _complete_tag(target) in ("a", "b")
    assert _debris(target) == []


def test_stale_partial_folder_of_a_dead_run_is_cleaned(tmp_path):
    target = tmp_path / "res"
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    start = "1"
    stale = tmp_path / f".res.v-{dead.pid}-{start}-abcd1234"
    stale.mkdir()
    (stale / "part0.txt").write_text("half")
    live = tmp_path / f".res.v-{os.getppid()}-{folders._start_time(os.getppid())}-abcd1234"
    live.mkdir()  # a live process's folder (the test runner's parent) is left alone
    assert _writer(target, "ok").wait() == 0
    assert not stale.exists() and live.exists()
    live.rmdir()
    assert _debris(target) == []


def test_a_swallowed_interrupt_still_stops_the_switch(tmp_path):
    target = tmp_path / "res"
    r = folders.reserve(target)
    (r.folder / "x").write_text("old")
    r.commit()
    old = os.readlink(target)
    previous = signal.getsignal(signal.SIGINT)
    folders.install_interrupt_flag()
    try:
        r = folders.reserve(target)
        try:  # C code or a finalizer that drops the KeyboardInterrupt
            os.kill(os.getpid(), signal.SIGINT)
            time.sleep(0.1)
        except KeyboardInterrupt:
            pass
        with pytest.raises(KeyboardInterrupt):
            r.commit()
        r.abort()
    finally:
        signal.signal(signal.SIGINT, previous)
        folders._INTERRUPTED = False
    assert os.readlink(target) == old and (target / "x").read_text() == "old"


def test_legacy_isoscope_folder_is_replaced_and_a_users_folder_is_not(tmp_path):
    legacy = tmp_path / "res"
    legacy.mkdir()
    (legacy / folders.MARKER).write_text("")
    (legacy / "result.json").write_text("{}")
    assert _writer(legacy, "new").wait() == 0
    assert _complete_tag(legacy) == "new" and _debris(legacy) == []
    mine = tmp_path / "mine"
    mine.mkdir()
    (mine / "notes.txt").write_text("keep")
    with pytest.raises(InputError, match="not written by isoscope"):
        folders.reserve(mine)
    assert (mine / "notes.txt").read_text() == "keep"
    os.symlink(mine, tmp_path / "link")
    with pytest.raises(InputError, match="isoscope did not write"):
        folders.reserve(tmp_path / "link")


@pytest.mark.parametrize(
    "label",
    [
        "../../x",
        "/etc/passwd",
        "a/b",
        "<b>bold</b>",
        "line\nbreak",
        "nul\x00byte",
        "x" * 300,
        "é" * 200,
        "..",
        ".",
        "-rf",
        "  ",
        "a\\b",
    ],
)
def test_safe_folder_name_is_one_harmless_component(label):
    name = folders.safe_folder_name(label)
    assert name and "/" not in name and "\\" not in name and "\x00" not in name and "\n" not in name
    assert not name.startswith((".", "-")) and "<" not in name and ">" not in name
    assert len(name.encode()) <= 110
    assert Path(name).name == name and name not in (".", "..")


def test_safe_folder_name_keeps_ordinary_labels_and_separates_altered_ones():
    assert folders.safe_folder_name("tanh-512_orth") == "tanh-512_orth"
    assert folders.safe_folder_name("deep tanh (v2)") == "deep tanh (v2)"
    assert folders.safe_folder_name("a/b") != folders.safe_folder_name("a-b")
    assert folders.safe_folder_name("a/b") != folders.safe_folder_name("a?b")


GOOD = """name = "NAME"
[network]
width = 12
depth = 3
activation = "tanh"
[init]
sigma_w = 1.1
sigma_b = 0.05
[analysis]
inputs = 1
"""


def test_spec_name_cannot_escape_the_default_folder(tmp_path):
    from isoscope import cli

    work = tmp_path / "work"
    work.mkdir()
    earlier = tmp_path / "earlier"
    earlier.mkdir()
    (earlier / folders.MARKER).write_text("")
    (earlier / "result.json").write_text("keep")
    spec = tmp_path / "s.toml"
    spec.write_text(GOOD.replace("NAME", "../../earlier"))
    cwd = os.getcwd()
    os.chdir(work)
    try:
        assert cli.main(["analyze", str(spec)]) == 0
    finally:
        os.chdir(cwd)
    assert (earlier / "result.json").read_text() == "keep"
    made = list((work / "isoscope-out").iterdir())
    shown = [p for p in made if not p.name.startswith(".")]
    assert len(shown) == 1 and shown[0].name.startswith("earlier-")
    assert json.loads((shown[0] / "result.json").read_text())["name"] == "../../earlier"


def test_interrupt_through_the_command_keeps_the_previous_folder(tmp_path):
    """SIGINT at several instants of real `isoscope analyze` runs: exit 130, folder intact."""
    spec = tmp_path / "s.toml"
    spec.write_text(GOOD.replace("NAME", "t"))
    (tmp_path / "outs").mkdir()
    out = tmp_path / "outs" / "res"
    env = {**os.environ, "PYTHONPATH": str(SRC)}
    env.pop(folders._PAUSE_ENV, None)
    first = subprocess.run(
        [sys.executable, "-m", "isoscope", "analyze", str(spec), "--out", str(out)],
        env=env,
        capture_output=True,
        text=True,
    )
    assert first.returncode == 0, first.stderr
    before = (out / "result.json").read_text()
    for delay, pause in ((0.3, None), (2.5, None), (None, "commit:30")):
        e = dict(env)
        if pause:
            e[folders._PAUSE_ENV] = pause
        p = subprocess.Popen(
            [
                sys.executable,
                "-m",
                "isoscope",
                "analyze",
                str(spec),
                "--out",
                str(out),
                "--seed",
                "5",
            ],
            env=e,
            stdout=subprocess.PIPE,
            stderr=subprocess.PIPE,
            text=True,
        )
        if pause:  # wait until the run sits in the pause just before its switch
            deadline = time.time() + 120
            while time.time() < deadline and not list(out.parent.glob(".res.v-*/result.json")):
                time.sleep(0.05)
            time.sleep(0.2)
        else:
            time.sleep(delay)
        p.send_signal(signal.SIGINT)
        _, err = p.communicate(timeout=120)
        # during the import Python's own handler is still in place: it dies of SIGINT (-2,
        # which a shell reports as 130) without writing anything
        assert p.returncode in (130, -signal.SIGINT) or (
            p.returncode == 0 and delay and delay > 2
        ), err
        if p.returncode == 130:
            assert "interrupted" in err
        if p.returncode != 0:
            assert (out / "result.json").read_text() == before
        before = (out / "result.json").read_text()
    assert _debris(out) == []


def test_a_dangling_link_of_ours_is_replaced(tmp_path):
    target = tmp_path / "res"
    os.symlink(".res.v-1-1-deadbeef", target)  # its version folder was removed by hand
    r = folders.reserve(target)
    (r.folder / "x").write_text("new")
    r.commit()
    assert (target / "x").read_text() == "new"
