"""Every bad input through the command line: exit 2, one line, no traceback, no output.

The corpus comes from make_corpus.py, written into a temporary folder. The line format is
the one docs/cli.md promises: `tinygen: error: FILE: node 'N': op OP: reason`.

Each case runs in a process of its own with its own exit code, stdout and stderr. Starting
`python -m tinygen` costs about a second (importing onnx), so the whole corpus runs in
children forked from this process, which call the same `tinygen.cli.main` that
`python -m tinygen` calls; a representative subset also runs as real
`python -m tinygen` subprocesses.
"""
from __future__ import annotations

import json
import os
import re
import subprocess
import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))
import forked_cli  # noqa: E402
import make_corpus  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
CASES = {c.name: c for c in make_corpus.cases()}
# Errors about a flag rather than the file: the line has no file to name.
FLAG_ERRORS = {"input_shape_bad_syntax", "bad_prefix_keyword", "bad_prefix_digit",
               "bad_size_flag", "input_shape_huge_dim", "input_shape_huge_product",
               "input_shape_too_many_dims", "input_shape_twice", "input_shape_underscore_digits",
               "samples_huge", "samples_zero", "samples_negative", "region_names_differ_in_case"}
# Errors about a file beside the model (--inputs, --float-model): the line names that file.
AUX_ERRORS = {"inputs": "inputs", "float": "float"}
# What no error line may hold: C0 controls (a tab or newline would split it), DEL, C1.
CONTROL = re.compile("[\x00-\x1f\x7f-\x9f]")
# One case per kind of failure, run as real `python -m tinygen` subprocesses.
SUBPROCESS_CASES = ["truncated_50", "float_model", "unsupported_op", "scale_nan",
                    "concat_axis_out_of_range", "arena_limit"]
LINE = re.compile(r"^tinygen: error: (?:(?P<file>[^:]+): )?(?:node '(?P<node>[^']*)': )?"
                  r"(?:op (?P<op>\S+): )?(?P<reason>.+)$")


def tinygen(*args: str, cwd: Path | None = None) -> subprocess.CompletedProcess:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    env.pop("TINYGEN_TRACEBACK", None)
    return subprocess.run([sys.executable, "-m", "tinygen", *args], capture_output=True,
                          text=True, env=env, cwd=cwd or ROOT, timeout=600)


def forked(*args: str) -> subprocess.CompletedProcess:
    """Run `tinygen args` in a forked child of this process (POSIX), like a subprocess."""
    if not hasattr(os, "fork"):
        return tinygen(*args)
    return forked_cli.forked(*args)


def command(verb: str, case, path: Path, out: Path) -> list[str]:
    """The command line of one case under one verb (emit writes to `out`)."""
    return [verb, str(path), *(["-o", str(out)] if verb == "emit" else []), *case.argv(path)]


@pytest.fixture(scope="module")
def results(tmp_path_factory):
    """Run every case once; {name: (case, model path, out dir, completed process)}."""
    # imported once here, shared by every forked child
    import onnx.reference  # noqa: F401

    import tinygen.cli  # noqa: F401
    import tinygen.codegen.emit  # noqa: F401
    base = tmp_path_factory.mktemp("corpus")
    done = {}
    for case, path in make_corpus.write_corpus(base / "models"):
        out = base / "out" / case.name / "tree"
        out.parent.mkdir(parents=True)
        done[case.name] = (case, path, out, forked(*command(case.verbs[0], case, path, out)))
    return done


@pytest.mark.parametrize("name", sorted(CASES))
def test_bad_input_gives_one_clear_line(results, name):
    case, path, out, r = results[name]
    assert r.returncode == 2, (r.returncode, r.stderr)
    assert r.stdout == ""
    lines = r.stderr.splitlines()
    assert len(lines) == 1, r.stderr
    line = lines[0]
    assert "Traceback" not in r.stderr and "internal error" not in line, line
    m = LINE.match(line)
    assert m, line
    assert not CONTROL.search(r.stderr.rstrip("\n")) and len(line) < 1500, line[:300]
    if name not in FLAG_ERRORS:
        aux = [make_corpus.aux_path(case, path, a) for a in case.aux if "{" + a + "}" in
               " ".join(case.args)]
        assert m["file"] == str(aux[0] if aux else path), line
    if case.node is not None:
        assert m["node"] == case.node, line
    if case.op is not None:
        assert m["op"] == case.op, line
    assert case.reason.lower() in m["reason"].lower(), line


@pytest.mark.parametrize("name", sorted(CASES))
def test_bad_input_leaves_no_output(results, name):
    _, _, out, _ = results[name]
    assert not out.exists()
    assert list(out.parent.iterdir()) == []  # no half-written temporary folder either


@pytest.mark.parametrize("name", SUBPROCESS_CASES)
def test_real_subprocess_prints_the_same_line(results, name, tmp_path):
    case, path, _, r = results[name]
    out = tmp_path / "tree"
    real = tinygen("emit", str(path), "-o", str(out), *case.args)
    assert (real.returncode, real.stdout, real.stderr) == (r.returncode, r.stdout, r.stderr)
    assert not out.exists()


def test_corpus_files_are_small(results):
    sizes = [p.stat().st_blocks * 512 for _, p, _, _ in results.values() if p.is_file()]
    assert sizes and max(sizes) < 16 * 1024  # on disk: model_too_large is a sparse file


@pytest.mark.parametrize("verb", ["emit", "check", "plan"])
def test_whole_corpus_through_every_verb_gives_exit_2_and_no_internal_error(results, verb,
                                                                            tmp_path):
    """Every case under every verb that takes its flags: exit 2, one line, never
    "internal error", no traceback, no output left."""
    for name, (case, path, _, _) in sorted(results.items()):
        if verb not in case.verbs:
            continue
        out = tmp_path / name / "tree"
        r = forked(*command(verb, case, path, out))
        lines = r.stderr.splitlines()
        assert r.returncode == 2 and len(lines) == 1, (name, r.returncode, r.stderr[-2000:])
        assert lines[0].startswith("tinygen: error: "), (name, lines[0][:300])
        assert "internal error" not in r.stderr and "Traceback" not in r.stderr, name
        assert not CONTROL.search(lines[0]), name
        assert r.stdout == "" and not out.parent.exists(), name


def test_hostile_names_are_escaped_and_capped(results):
    _, _, _, r = results["control_bytes_in_node_name"]
    line = r.stderr.splitlines()[0]
    assert "\\x1b]0;owned\\x07\\x1b[2J" in line and "(10014 chars)" in line, line[:300]
    _, _, _, r = results["control_bytes_in_tensor_name"]
    line = r.stderr.splitlines()[0]
    assert "\\x9b31m\\x7f" in line and "(10005 chars)" in line, line[:300]


def _good_model(tmp_path: Path) -> Path:
    path = tmp_path / "good.onnx"
    make_corpus.save(make_corpus.qdq_model())(path)
    return path


def test_existing_outdir_is_untouched_without_force(tmp_path):
    good = _good_model(tmp_path)
    bad = tmp_path / "bad.onnx"
    bad.write_bytes(b"not a model")
    out = tmp_path / "out"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    for args in (["emit", str(good), "-o", str(out)],             # exists, no --force
                 ["emit", str(bad), "-o", str(out)],              # fails before writing
                 ["emit", str(bad), "-o", str(out), "--force"]):  # fails, even with --force
        r = forked(*args)
        assert r.returncode == 2 and len(r.stderr.splitlines()) == 1, r.stderr
        assert sorted(p.name for p in out.iterdir()) == ["keep.txt"]
        assert (out / "keep.txt").read_text() == "mine"
    assert "--force" in forked("emit", str(good), "-o", str(out)).stderr
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.onnx", "good.onnx", "out"]


def test_force_replaces_a_tree_tinygen_wrote_whole(tmp_path):
    good = _good_model(tmp_path)
    out = tmp_path / "out"
    assert forked("emit", str(good), "-o", str(out), "--prefix", "first").returncode == 0
    r = forked("emit", str(good), "-o", str(out), "--force")
    assert r.returncode == 0, r.stderr
    names = sorted(p.name for p in out.iterdir())
    assert "first.c" not in names and "model.c" in names and "tinygen-tree.txt" in names
    assert sorted(p.name for p in tmp_path.iterdir()) == ["good.onnx", "out"]  # no temp left


def test_other_verbs_and_json_report_bad_input_the_same_way(tmp_path):
    bad = tmp_path / "bad.onnx"
    bad.write_bytes(b"\x08\x07garbage")
    for args in (["check", str(bad), "--samples", "2"], ["plan", str(bad), "--json"],
                 ["emit", str(bad), "-o", str(tmp_path / "o"), "--json"]):
        r = forked(*args)
        lines = r.stderr.splitlines()
        assert r.returncode == 2 and len(lines) == 1, (args, r.stderr)
        assert lines[0].startswith(f"tinygen: error: {bad}: "), lines
        if "--json" in args:  # stdout: one JSON object saying the same (docs/cli.md)
            assert json.loads(r.stdout)["error"] == lines[0][len("tinygen: error: "):]
        else:
            assert r.stdout == "", (args, r.stdout)
    assert not (tmp_path / "o").exists()
