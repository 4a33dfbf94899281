"""No file tinygen did not write is ever lost, whatever the output path and whenever an
interrupt comes (docs/guarantees.md, "Output files").

Each layout is generated here: a folder holding the model, OUT = the current folder, a
symlink, a file, a tree with a user's file in it, a name too long for the file system, a
full disk (simulated in the child), and SIGINT/SIGTERM delivered from outside while the
child waits at a named point of the write (`tinygen.codegen.output._reached`).
"""
from __future__ import annotations

import errno
import os
import signal
import stat
import subprocess
import sys
import time
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))
import make_corpus  # noqa: E402
from forked_cli import Child, forked  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
pytestmark = pytest.mark.skipif(not hasattr(os, "fork"), reason="forks the CLI")


@pytest.fixture()
def model(tmp_path) -> Path:
    path = tmp_path / "m.onnx"
    make_corpus.save(make_corpus.qdq_model())(path)
    return path


def refused(r, *fragments: str) -> str:
    """The one error line of a refusal (exit 2), which must hold every fragment."""
    lines = r.stderr.splitlines()
    assert r.returncode == 2 and len(lines) == 1, (r.returncode, r.stderr)
    assert lines[0].startswith("tinygen: error: ") and "internal error" not in lines[0]
    for f in fragments:
        assert f in lines[0], lines[0]
    return lines[0]


def snapshot(folder: Path) -> dict[str, bytes]:
    """Every entry under `folder` (names relative), files with their bytes."""
    out = {}
    for p in sorted(folder.rglob("*")):
        rel = str(p.relative_to(folder))
        out[rel] = p.read_bytes() if p.is_file() and not p.is_symlink() else b"<entry>"
    return out


def no_debris(folder: Path) -> None:
    """No temporary folder or file of a write is left in `folder`."""
    left = [p.name for p in folder.iterdir() if ".tinygen-" in p.name]
    assert left == [], left


def test_tree_has_a_manifest_that_sha256sum_accepts(model, tmp_path):
    out = tmp_path / "out"
    r = forked("emit", model, "-o", out)
    assert r.returncode == 0, r.stderr
    assert "tinygen-tree.txt" in {p.name for p in out.iterdir()}
    # coreutils sha256sum reads the manifest's format (common practice: `sha256sum -c`)
    check = subprocess.run(["sha256sum", "--check", "--strict", "tinygen-tree.txt"],
                           cwd=out, capture_output=True, text=True)
    assert check.returncode == 0, check.stdout + check.stderr
    listed = {line.split("  ", 1)[1] for line in (out / "tinygen-tree.txt").read_text()
              .splitlines()}
    assert listed == {p.name for p in out.iterdir()} - {"tinygen-tree.txt"}


def test_force_refuses_a_folder_holding_the_model(model, tmp_path):
    proj = tmp_path / "proj"
    proj.mkdir()
    inner = proj / "model.onnx"
    inner.write_bytes(model.read_bytes())
    (proj / "notes.txt").write_text("mine")
    before = snapshot(proj)
    refused(forked("emit", inner, "-o", proj, "--force"), "holds the input")
    # run from inside proj, the model given relatively: still refused
    refused(forked("emit", "model.onnx", "-o", ".", "--force", cwd=proj), "'.'")
    assert snapshot(proj) == before
    no_debris(tmp_path)


@pytest.mark.parametrize("flag", ["--float-model", "--inputs"])
def test_force_refuses_a_folder_holding_any_input(model, tmp_path, flag):
    out = tmp_path / "out"
    assert forked("emit", model, "-o", out).returncode == 0
    aux = out / "aux.bin"
    aux.write_bytes(b"x")  # an input file placed inside an emitted tree
    # emit takes neither flag, so check the rule where it is applied: output.target_folder
    from tinygen.codegen.output import target_folder
    from tinygen.errors import TinygenError
    with pytest.raises(TinygenError, match="holds the input"):
        target_folder(str(out), "force", [str(model), str(aux)])
    assert aux.read_bytes() == b"x"


@pytest.mark.parametrize("out_arg", ["", ".", "..", "./", "sub/..", "/"])
def test_dot_empty_and_root_outputs_are_refused(model, tmp_path, out_arg):
    work = tmp_path / "work"
    (work / "sub").mkdir(parents=True)
    (work / "keep.txt").write_text("mine")
    before = snapshot(tmp_path)
    refused(forked("emit", model, "-o", out_arg, "--force", cwd=work))
    assert snapshot(tmp_path) == before  # no ..old.XXXX or temporary folder anywhere


def test_output_holding_the_current_folder_is_refused(model, tmp_path):
    out = tmp_path / "out"
    assert forked("emit", model, "-o", out).returncode == 0
    (out / "deeper").mkdir()  # the user works inside the tree (foreign too)
    line = refused(forked("emit", model, "-o", out, "--force", cwd=out / "deeper"))
    assert "current folder" in line
    assert (out / "deeper").is_dir()


def test_foreign_changed_and_nested_entries_are_named_and_kept(model, tmp_path):
    out = tmp_path / "out"
    assert forked("emit", model, "-o", out).returncode == 0
    (out / "model.c").write_text((out / "model.c").read_text() + "/* my fix */\n")
    (out / "mine.txt").write_text("mine")
    (out / "build").mkdir()
    (out / "link.h").symlink_to(out / "model.h")
    before = snapshot(out)
    line = refused(forked("emit", model, "-o", out, "--force"), "did not write")
    for name in ("build", "link.h", "mine.txt"):
        assert name in line
    assert snapshot(out) == before
    line = refused(forked("emit", model, "-o", out, "--add", "--prefix", "other"))
    assert snapshot(out) == before
    no_debris(tmp_path)


def test_folder_without_manifest_is_refused_and_changed_file_named(model, tmp_path):
    out = tmp_path / "out"
    assert forked("emit", model, "-o", out).returncode == 0
    (out / "model.c").write_text("int edited;\n")
    refused(forked("emit", model, "-o", out, "--force"), "model.c (changed)")
    (out / "tinygen-tree.txt").unlink()
    refused(forked("emit", model, "-o", out, "--force"), "no tinygen-tree.txt")
    assert (out / "model.c").read_text() == "int edited;\n"


def test_a_file_is_never_turned_into_a_folder(model, tmp_path):
    target = tmp_path / "out"
    target.write_text("mine")
    refused(forked("emit", model, "-o", target, "--force"), "is a file")
    assert target.read_text() == "mine"
    no_debris(tmp_path)


def test_symlink_output_writes_into_its_target_and_keeps_the_link(model, tmp_path):
    real = tmp_path / "real"
    link = tmp_path / "link"
    real.mkdir()
    link.symlink_to(real)
    assert forked("emit", model, "-o", link).returncode == 0
    assert link.is_symlink() and os.readlink(link) == str(real)
    assert (real / "model.c").is_file()
    assert forked("emit", model, "-o", link, "--force", "--prefix", "again").returncode == 0
    assert link.is_symlink() and (real / "again.c").is_file()
    assert not (real / "model.c").exists()
    dangling = tmp_path / "dangling"
    dangling.symlink_to(tmp_path / "nowhere")
    refused(forked("emit", model, "-o", dangling), "symlink to nothing")
    no_debris(tmp_path)


@pytest.mark.parametrize("umask", [0o022, 0o077, 0o002])
def test_modes_follow_the_umask(model, tmp_path, umask):
    out = tmp_path / "out"
    assert forked("emit", model, "-o", out, umask=umask).returncode == 0
    assert stat.S_IMODE(out.stat().st_mode) == 0o777 & ~umask
    for p in out.iterdir():
        assert stat.S_IMODE(p.stat().st_mode) == 0o666 & ~umask, p.name
    svg = tmp_path / "plan.svg"
    assert forked("plan", model, "--svg", svg, umask=umask).returncode == 0
    assert stat.S_IMODE(svg.stat().st_mode) == 0o666 & ~umask


def test_name_longer_than_the_file_system_allows(model, tmp_path):
    long_name = tmp_path / ("n" * 300)
    line = refused(forked("emit", model, "-o", long_name), "longer than the file system")
    assert "(3" in line  # the path is shown capped, with its length
    deep = tmp_path / "/".join(["d" * 200] * 30)  # longer than PATH_MAX
    refused(forked("emit", model, "-o", deep), "longer than the file system")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.onnx"]


def _fail_nth(module_attr: str, n: int, err: int):
    """A `before` hook: the n-th call of tinygen.codegen.output's `module_attr` (open, or
    os.rename) raises OSError(err), as a full disk or a read-only folder would."""
    def before():
        import builtins

        from tinygen.codegen import output
        calls = [0]
        real = builtins.open if module_attr == "open" else os.rename

        def failing(*a, **k):
            calls[0] += 1
            if calls[0] == n:
                raise OSError(err, os.strerror(err))
            return real(*a, **k)
        if module_attr == "open":
            output.open = failing
        else:
            output.os.rename = failing
    return before


@pytest.mark.parametrize("existing", [False, True])
def test_full_disk_and_failed_rename_leave_old_tree_and_no_debris(model, tmp_path, existing):
    out = tmp_path / "out"
    if existing:
        assert forked("emit", model, "-o", out, "--prefix", "old").returncode == 0
    before = snapshot(tmp_path)
    refused(forked("emit", model, "-o", out, "--force", before=_fail_nth("open", 3,
                                                                         errno.ENOSPC)),
            "No space left on device")
    assert snapshot(tmp_path) == before
    refused(forked("emit", model, "-o", out, "--force",
                   before=_fail_nth("rename", 2 if existing else 1, errno.EACCES)),
            "Permission denied")
    assert snapshot(tmp_path) == before


def test_missing_parents_made_for_a_failed_tree_are_removed(model, tmp_path):
    out = tmp_path / "a" / "b" / "out"
    refused(forked("emit", model, "-o", out, before=_fail_nth("open", 1, errno.ENOSPC)),
            "No space left")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.onnx"]


def test_report_and_svg_never_write_over_an_input_or_a_folder(model, tmp_path):
    before = model.read_bytes()
    refused(forked("plan", model, "--svg", model), "is the input")
    refused(forked("report", model, "-o", model, "--samples", "1"), "is the input")
    refused(forked("plan", model, "--svg", tmp_path), "is a folder")
    refused(forked("plan", model, "--svg", ""), "give the file a name")
    assert model.read_bytes() == before
    no_debris(tmp_path)


# -- interrupts ---------------------------------------------------------------------------

def _pause_at(point: str, marker: Path, seconds: float = 1.0):
    """A `before` hook: at `point` of the write, say so in `marker` and wait `seconds`."""
    def before():
        from tinygen.codegen import output

        def reached(name: str) -> None:
            if name == point:
                marker.write_text(name)
                time.sleep(seconds)
        output._reached = reached
    return before


def _interrupt(args, point: str, signum: int, tmp_path: Path):
    marker = tmp_path / "reached"
    child = Child(tuple(str(a) for a in args), before=_pause_at(point, marker))
    deadline = time.monotonic() + 120
    while not marker.exists():
        assert time.monotonic() < deadline, "the child never reached " + point
        time.sleep(0.02)
    os.kill(child.pid, signum)
    r = child.wait()
    marker.unlink()
    return r


def _tree_of(out: Path) -> str:
    """Which tree OUT is: the prefix of its model.h (old / new), or 'missing'."""
    if not out.exists():
        return "missing"
    prefixes = {p.stem for p in out.glob("*.h") if not p.name.startswith("tg_")}
    assert len(prefixes) == 1, prefixes
    listed = {line.split("  ", 1)[1]
              for line in (out / "tinygen-tree.txt").read_text().splitlines()}
    assert {p.name for p in out.iterdir()} == listed | {"tinygen-tree.txt"}
    return prefixes.pop()


# point -> what OUT must be after the interrupt: signals wait out the swap, so an interrupt
# between the two renames (or after them) finds the new tree in place
EXPECTED = {"writing": "old", "written": "old", "swapping": "new", "swapped": "new"}


@pytest.mark.parametrize("point", sorted(EXPECTED))
@pytest.mark.parametrize("signum", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_interrupt_at_any_point_leaves_old_or_new_and_no_debris(model, tmp_path, point,
                                                                signum):
    out = tmp_path / "out"
    assert forked("emit", model, "-o", out, "--prefix", "old").returncode == 0
    r = _interrupt(["emit", model, "-o", out, "--force", "--prefix", "new"], point, signum,
                   tmp_path)
    name = "SIGINT" if signum == signal.SIGINT else "SIGTERM"
    assert r.returncode == 128 + signum, (r.returncode, r.stderr)
    assert r.stderr.splitlines() == [f"tinygen: interrupted ({name})"], r.stderr
    assert _tree_of(out) == EXPECTED[point]
    no_debris(tmp_path)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.onnx", "out"]


@pytest.mark.parametrize("point", ["writing", "written"])
def test_interrupt_of_a_first_write_leaves_nothing(model, tmp_path, point):
    out = tmp_path / "new" / "out"
    r = _interrupt(["emit", model, "-o", out, "--json"], point, signal.SIGINT, tmp_path)
    assert r.returncode == 130 and len(r.stderr.splitlines()) == 1, r.stderr
    assert '"exit_code": 130' in r.stdout
    assert sorted(p.name for p in tmp_path.iterdir()) == ["m.onnx"]


def test_interrupt_of_a_report_leaves_the_old_file(model, tmp_path):
    svg = tmp_path / "plan.svg"
    svg.write_text("old")
    r = _interrupt(["plan", model, "--svg", svg], "written", signal.SIGINT, tmp_path)
    assert r.returncode == 130, r.stderr
    assert svg.read_text() == "old"
    no_debris(tmp_path)


def test_real_process_interrupted_between_renames_prints_one_line(model, tmp_path):
    """`python -m tinygen` itself (handlers installed for the process, not a forked test
    child), SIGINT between the two renames: exit 130, one line, the new tree."""
    out = tmp_path / "out"
    assert forked("emit", model, "-o", out, "--prefix", "old").returncode == 0
    marker = tmp_path / "reached"
    code = ("import sys, time, runpy\n"
            "from tinygen.codegen import output\n"
            "def reached(name):\n"
            "    if name == 'swapping':\n"
            f"        open({str(marker)!r}, 'w').close(); time.sleep(1)\n"
            "output._reached = reached\n"
            "sys.argv = ['tinygen'] + sys.argv[1:]\n"
            "runpy.run_module('tinygen', run_name='__main__')\n")
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    env.pop("TINYGEN_TRACEBACK", None)
    p = subprocess.Popen([sys.executable, "-c", code, "emit", str(model), "-o", str(out),
                          "--force", "--prefix", "new"], env=env, stdout=subprocess.PIPE,
                         stderr=subprocess.PIPE, text=True)
    deadline = time.monotonic() + 300
    while not marker.exists():
        assert time.monotonic() < deadline and p.poll() is None, p.communicate()
        time.sleep(0.02)
    p.send_signal(signal.SIGINT)
    stdout, stderr = p.communicate(timeout=300)
    assert p.returncode == 130, stderr
    assert stderr.splitlines() == ["tinygen: interrupted (SIGINT)"] and stdout == ""
    assert _tree_of(out) == "new"
    no_debris(tmp_path)
