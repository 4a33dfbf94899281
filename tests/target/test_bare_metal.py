"""Bare-metal checks: warning-free builds for every core, no heap, faults and hangs caught."""
import shutil
from pathlib import Path

import pytest

from tinygen.emulate import emulate
from tinygen.errors import TinygenError
from tinygen.harness import target

pytestmark = pytest.mark.target

FIXTURES = Path(__file__).resolve().parent / "fixtures"


@pytest.mark.parametrize("opt", ["-Os", "-O2"])
@pytest.mark.parametrize("cpu", list(target.BOARDS))
@pytest.mark.parametrize("tree", ["addone", "door", "spin"])
def test_fixture_trees_build_warning_free(tree, cpu, opt, tmp_path):
    objects = target.check_tree_compiles(FIXTURES / tree, cpu, opt, tmp_path)
    assert objects and all(o.exists() for o in objects)


def test_a_warning_fails_the_build(tmp_path):
    tree = tmp_path / "tree"
    shutil.copytree(FIXTURES / "spin", tree)
    src = tree / "tg_loop.c"
    src.write_text(src.read_text().replace("void tg_loop(uint32_t count)\n{",
                                           "void tg_loop(uint32_t count)\n{\n    int unused;"))
    with pytest.raises(TinygenError, match="unused"):
        target.check_tree_compiles(tree, "cortex-m4", "-Os", tmp_path / "obj")


def test_heap_use_is_flagged(tmp_path):
    # A tree that calls malloc links only with an _sbrk; give it one so the image links,
    # then the symbol check must name both.
    tree = tmp_path / "tree"
    shutil.copytree(FIXTURES / "spin", tree)
    (tree / "tg_heap.c").write_text(
        "/* tg_heap.c - a tree that should not exist: it uses the heap. */\n"
        "#include <stddef.h>\n#include <stdint.h>\n#include <stdlib.h>\n"
        "void *_sbrk(ptrdiff_t incr);\n"
        "void *_sbrk(ptrdiff_t incr)\n{\n    (void)incr;\n    return (void *)-1;\n}\n")
    spin = tree / "spin.c"
    spin.write_text(spin.read_text().replace(
        "    tg_loop(base[0]);",
        "    {\n        void *volatile block = malloc(4);\n        free(block);\n    }\n"
        "    tg_loop(base[0]);").replace(
        "#include <stdint.h>\n", "#include <stdint.h>\n#include <stdlib.h>\n", 1))
    fig = emulate(tree, "spin", "cortex-m3", [[bytes(4)]], requant_float=False, per_op=False)
    assert {"malloc", "free", "_sbrk"} <= set(fig["forbidden_symbols"])


def _firmware(tmp_path: Path, body: str, cpu: str = "cortex-m3") -> Path:
    """A test program on the harness start-up code."""
    board = target.board_for(cpu)
    main = tmp_path / "main.c"
    main.write_text("#include \"tg_fw_semihost.h\"\n"
                    f"int main(void)\n{{\n{body}\n}}\n")
    flags = [*target.firmware_defines(board), f"-I{target.FIRMWARE_DIR}"]
    objs = [target.compile_c(src, tmp_path / f"{src.stem}.o", board, flags=flags)
            for src in (target.FIRMWARE_DIR / "tg_fw_startup.c",
                        target.FIRMWARE_DIR / "tg_fw_semihost.c", main)]
    return target.link(objs, tmp_path / "test.elf", board)


def test_exit_status_and_console_output(tmp_path):
    elf = _firmware(tmp_path, '    tg_fw_write0("hello from the board\\n");\n    return 7;')
    result = target.run_elf(elf, target.board_for("cortex-m3"), timeout=10)
    assert result.status == 7
    assert result.stdout == "hello from the board\n"


@pytest.mark.parametrize("cpu", ["cortex-m3", "cortex-m33"])
def test_fault_is_reported(cpu, tmp_path):
    # An undefined instruction (udf #0) must end in the fault handler, not a hang.
    elf = _firmware(tmp_path, '    __asm__ volatile(".short 0xde00");\n    return 0;', cpu)
    board = target.board_for(cpu)
    result = target.run_elf(elf, board, timeout=10)
    report = target.parse_report(result.stdout)
    assert result.status == target.FAULT_STATUS and report.fault
    with pytest.raises(TinygenError, match="faulted"):
        target.check_report(report, result, board)


def test_hang_times_out(tmp_path):
    elf = _firmware(tmp_path, "    for (;;) {\n    }")
    with pytest.raises(TinygenError, match="did not exit"):
        target.run_elf(elf, target.board_for("cortex-m3"), timeout=1.0)
