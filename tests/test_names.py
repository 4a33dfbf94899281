"""Names from the ONNX file never reach the C unescaped, and --prefix is a safe C name.

A model whose graph, node and tensor names (and file name) hold comment ends, preprocessor
lines, quotes, newlines, backslashes, trigraph starts, non-ASCII text, and names that collide
once sanitised or with the names the passes derive, is emitted and compiled with gcc and
clang (-std=c99 -Wall -Wextra -Wpedantic -Werror), then run bit for bit against the
reference and compared with onnxruntime (which takes any names: the arithmetic must not
care). The C with its comments stripped by the compiler's own preprocessor must contain no
fragment of any name.
"""
from __future__ import annotations

import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import onnx
import pytest
from onnx import TensorProto, helper, numpy_helper

from tinygen.check import random_inputs, run_check
from tinygen.cli import main as cli_main
from tinygen.codegen.cfmt import c_comment_text, check_prefix
from tinygen.codegen.emit import render_tree, write_tree
from tinygen.compiler import BuildOptions, compile_model

STRICT = ["-std=c99", "-Wall", "-Wextra", "-Wpedantic", "-Werror", "-ffp-contract=off"]
COMPILERS = [cc for cc in ("gcc", "clang") if shutil.which(cc)]

# Every hostile name carries the marker "evil" or non-ASCII text, so a leak is findable.
HOSTILE = [
    "in */ int evil_a; /*", "#include <evil_b.h>", "\n#define EVIL_C 1\n",
    "\"evil_d\" 'quoted'", "evil_e\\", "evil_f??/", "???/evil_g", "??=define evil_h",
    "evil_i ??' ??( ??) ??! ??< ??> ??-", "evil_j\r\nline\ttab", "Pumpe_Schwingung_\u00fc",
    "\u632f\u52d5\u30bb\u30f3\u30b5", "\U0001f680 evil_k", "\u2028evil_l\u2029",
    "\ufeffevil_m", "evil_n\x00nul", "evil_o */", "/* evil_p", "// evil_q", "evil_" + "r" * 3000,
    # these two read the same once "*/" is broken up in a comment
    "evil_s*/x", "evil_s* /x",
    # these collide with the names the frontend and passes derive (suffixes #N, _nk, @cl)
    "evil_t", "evil_t#1", "evil_t%40cl", "evil_t@cl",
]


def _names():
    """Unique tensor names, in the order the graph below takes them."""
    pool = iter(HOSTILE + [f"evil_extra{i}" for i in range(40)])
    return lambda: next(pool)


def hostile_model() -> onnx.ModelProto:
    """QDQ: x -Q-DQ-> Conv -> Relu -Q-DQ-> MaxPool -> Flatten -> Gemm -Q-DQ-> y, y2 = y."""
    nm = _names()
    rng = np.random.default_rng(0)
    x, xq, xd, w, wd, b, bd, c, r = (nm() for _ in range(9))
    p, f, fw, fwd, g, gq, y, y2 = (nm() for _ in range(8))
    rq, rd = fw + "_nk@cl", nm()  # the layout pass's name for the permuted fc weight
    ws = np.float32([0.01, 0.02, 0.015, 0.012])

    def init(name, a):
        return numpy_helper.from_array(np.asarray(a), name)

    inits = [init("sx", np.float32(0.05)), init("zx", np.uint8(128)),
             init(w, rng.integers(-100, 100, (4, 2, 3, 3)).astype(np.int8)),
             init("ws", ws), init("wz", np.zeros(4, np.int8)),
             init(b, rng.integers(-500, 500, 4).astype(np.int32)),
             init("bs", (np.float32(0.05) * ws).astype(np.float32)),
             init("bz", np.zeros(4, np.int32)),
             init("sr", np.float32(0.04)), init("zr", np.uint8(0)),
             init(fw, rng.integers(-90, 90, (36, 3)).astype(np.int8)),
             init("fs", np.float32(0.02)), init("fz", np.int8(0)),
             init("sy", np.float32(0.1)), init("zy", np.uint8(120))]
    node_names = iter(HOSTILE[::-1] + ["", "", "dup", "dup"])  # empty and repeated are legal
    spec = [("QuantizeLinear", [x, "sx", "zx"], [xq], {}),
            ("DequantizeLinear", [xq, "sx", "zx"], [xd], {}),
            ("DequantizeLinear", [w, "ws", "wz"], [wd], {"axis": 0}),
            ("DequantizeLinear", [b, "bs", "bz"], [bd], {"axis": 0}),
            ("Conv", [xd, wd, bd], [c], {"pads": [1, 1, 1, 1]}),
            ("Relu", [c], [r], {}),
            ("QuantizeLinear", [r, "sr", "zr"], [rq], {}),
            ("DequantizeLinear", [rq, "sr", "zr"], [rd], {}),
            ("MaxPool", [rd], [p], {"kernel_shape": [2, 2], "strides": [2, 2]}),
            ("Flatten", [p], [f], {}),
            ("DequantizeLinear", [fw, "fs", "fz"], [fwd], {}),
            ("Gemm", [f, fwd], [g], {}),
            ("QuantizeLinear", [g, "sy", "zy"], [gq], {}),
            ("DequantizeLinear", [gq, "sy", "zy"], [y], {}),
            ("Identity", [y], [y2], {})]
    nodes = [helper.make_node(op, ins, outs, name=next(node_names), **attrs)
             for op, ins, outs, attrs in spec]
    graph = helper.make_graph(
        nodes, "graph */ evil_graph \\ ??/ \u00e9\n#error", [helper.make_tensor_value_info(
            x, TensorProto.FLOAT, [1, 2, 6, 6])],
        [helper.make_tensor_value_info(y, TensorProto.FLOAT, [1, 3]),
         helper.make_tensor_value_info(y2, TensorProto.FLOAT, [1, 3])], inits)
    m = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    m.ir_version = 8
    onnx.checker.check_model(m)
    return m


@pytest.fixture(scope="module")
def hostile(tmp_path_factory):
    """(model path, emitted tree) for the hostile model; the file name is hostile too."""
    base = tmp_path_factory.mktemp("names")
    path = base / "pump * evil_file \\ ??= \u00fc\n*.onnx"  # "/" cannot be in a name
    onnx.save(hostile_model(), path)
    x_name = HOSTILE[0]
    c = compile_model(str(path), BuildOptions(input_shapes=[f"{x_name}=1x2x6x6"]))
    tree = base / "tree"
    write_tree(render_tree(c, f"--input-shape {x_name}=1x2x6x6"), str(tree), force=False)
    return path, c, tree


def _code_without_comments(cc: str, src: Path, tree: Path) -> str:
    """The file as the compiler sees it after removing comments (directives kept)."""
    out = subprocess.run([cc, "-std=c99", "-fpreprocessed", "-dD", "-E", "-P", f"-I{tree}",
                          str(src)], capture_output=True, text=True, check=True)
    return out.stdout


def test_emitted_tree_is_plain_ascii_without_trigraphs_or_splices(hostile):
    _, _, tree = hostile
    for f in tree.iterdir():
        data = f.read_bytes()
        assert all(b < 128 for b in data), f.name
        text = data.decode()
        assert not re.search(r"\?\?[=/'()!<>-]", text), f.name
        if not f.name.startswith("tg_") or f.name == "tg_config.h":  # generated, not copied
            assert not any(line.endswith("\\") for line in text.splitlines()), f.name


@pytest.mark.skipif(not COMPILERS, reason="no C compiler")
def test_no_name_from_the_model_outside_comments(hostile):
    _, _, tree = hostile
    cc = COMPILERS[0]
    for f in sorted(tree.glob("*.[ch]")):
        code = _code_without_comments(cc, f, tree)
        assert "evil" not in code.lower() and "quoted" not in code, f.name
        assert "Schwingung" not in code and "graph" not in code, f.name
    model_c = (tree / "model.c").read_text()
    assert "evil" in model_c  # the names are there, in comments: the check above has teeth


@pytest.mark.parametrize("cc", COMPILERS)
def test_hostile_tree_compiles_warning_free(hostile, cc, tmp_path):
    _, _, tree = hostile
    for src in sorted(tree.glob("*.c")):
        r = subprocess.run([cc, *STRICT, "-c", str(src), f"-I{tree}", "-o",
                            str(tmp_path / (src.stem + ".o"))], capture_output=True, text=True)
        assert r.returncode == 0, r.stderr


@pytest.mark.onnxruntime_exact
def test_hostile_model_runs_bit_exact_and_matches_onnxruntime(hostile):
    path, c, _ = hostile
    res = run_check(c, str(path), random_inputs(c.graph, 20, seed=1), "names",
                    against_ort=True)
    assert res.bit_exact, res
    # source: onnxruntime CPU provider, default optimisations (fuses the QDQ pairs)
    assert res.onnxruntime["max_abs_diff"] <= 1, res.onnxruntime


def test_comment_text_escapes():
    # the C99 trigraphs (ISO/IEC 9899:1999 5.2.1.1) start with "??": none may be left
    for text in ["???/", "??/", "????=", "a??b"]:
        assert "??" not in c_comment_text(text)
    assert c_comment_text("a\\") == "a\\x5c"
    assert c_comment_text("x*/y/*z//") == "x* /y/ *z/ /"
    assert c_comment_text("\u00fc\U0001f680\n") == "\\xfc\\U0001f680\\x0a"
    assert len(c_comment_text("q" * 500, 50)) == 50


@pytest.mark.parametrize("prefix", ["static", "int", "_Bool", "restrict", "inline", "9lives",
                                    "", "my-model", "a b", "x" * 32, "_model", "__x",
                                    "tg_conv", "tg", "TG_x", "tg_config", "stdint", "String",
                                    "math", "kws\n", "k\u00fc"])
def test_bad_prefix_is_refused(prefix, capsys):
    with pytest.raises(ValueError):
        check_prefix(prefix)
    assert cli_main(["emit", "nonexistent.onnx", "-o", "unused", "--prefix", prefix]) == 2
    err = capsys.readouterr().err.splitlines()
    assert len(err) == 1 and "--prefix" in err[0] and "nonexistent" not in err[0], err


def test_library_refuses_a_bad_prefix_too(hostile):
    from tinygen.errors import TinygenError
    path, _, _ = hostile
    with pytest.raises(TinygenError, match="standard header"):
        compile_model(str(path), BuildOptions(prefix="stdint",
                                              input_shapes=[f"{HOSTILE[0]}=1x2x6x6"]))


@pytest.mark.parametrize("cc", COMPILERS)
def test_two_prefixes_link_into_one_program(hostile, cc, tmp_path):
    """Two models with their own prefixes (kernels taken once) make one program."""
    path, _, _ = hostile
    opts = {"input_shapes": [f"{HOSTILE[0]}=1x2x6x6"]}
    objs = []
    for i, prefix in enumerate(["pump", "Door_v2"]):
        tree = tmp_path / prefix
        c = compile_model(str(path), BuildOptions(prefix=prefix, **opts))
        write_tree(render_tree(c, ""), str(tree), force=False)
        for src in sorted(tree.glob("*.c")):
            if src.name.startswith("tg_") and i > 0:
                continue  # the kernels come once
            obj = tmp_path / f"{prefix}_{src.stem}.o"
            subprocess.run([cc, *STRICT, "-c", str(src), f"-I{tree}", "-o", str(obj)],
                           check=True)
            objs.append(str(obj))
    main_c = tmp_path / "main.c"
    main_c.write_text('#include "pump.h"\n#include "Door_v2.h"\n'
                      "int main(void) { return pump_run(0, 0, 0) | Door_v2_run(0, 0, 0); }\n")
    exe = tmp_path / "both"
    subprocess.run([cc, *STRICT, f"-I{tmp_path / 'pump'}", f"-I{tmp_path / 'Door_v2'}",
                    str(main_c), *objs, "-lm", "-o", str(exe)], check=True)
    assert subprocess.run([str(exe)]).returncode == 0
