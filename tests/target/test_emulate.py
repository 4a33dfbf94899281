"""emulate() on the hand-written fixture trees, on every supported board under QEMU."""
import shutil
import subprocess
from pathlib import Path

import pytest

from tinygen.emulate import emulate, json_ready
from tinygen.errors import TinygenError
from tinygen.harness import target
from tinygen.harness.toolchain import find_toolchain

pytestmark = pytest.mark.target

FIXTURES = Path(__file__).resolve().parent / "fixtures"
CPUS = list(target.BOARDS)


def lut(v: int) -> int:
    """The fixture table as documented in addone/model.c: int8((v * 37 + 11) mod 256)."""
    return (v * 37 + 11) & 0xFF


def addone_expected(data: bytes) -> bytes:
    # Computed here from the fixture's stated behaviour, independently of its C code.
    out = []
    for b in data:
        v = b - 256 if b > 127 else b
        t = ((v + 1 + 128) & 0xFF) - 128        # int8 wrap-around of v + 1
        out.append(lut(t))
    return bytes(out)


def spin_samples(counts):
    return [[n.to_bytes(4, "little")] for n in counts]


@pytest.mark.parametrize("cpu", CPUS)
def test_addone_runs_and_measures(cpu, tmp_path):
    samples = [bytes(range(1, 17)), bytes([3] + [0x7F] * 15), bytes(range(0x80, 0x90))]
    fig = emulate(FIXTURES / "addone", "model", cpu, [[s] for s in samples],
                  requant_float=False, work_dir=tmp_path)
    assert fig["outputs"] == [[addone_expected(s)] for s in samples]
    assert fig["cpu"] == cpu and fig["board"] == target.BOARDS[cpu].machine
    assert fig["forbidden_symbols"] == [] and fig["float_instructions"] == []

    # Flash and RAM by difference against the baseline must equal what nm says the
    # model's own symbols occupy (every symbol defined by the tree's objects).
    model_syms: set[str] = set()
    for obj in (tmp_path / "tree").glob("*.o"):
        model_syms |= set(target.symbol_sizes(obj))
    sizes = target.symbol_sizes(tmp_path / "figures.elf")
    assert fig["ram_bytes"] == sizes["model_static_arena"] == 48
    code_and_consts = sum(sizes[n] for n in model_syms if n in sizes) - 48
    # Equal up to alignment padding: functions start 4-byte aligned, so each one linked in
    # (or each stub of the baseline) may carry up to 2 bytes of padding that nm does not
    # count (seen on the cortex-m55 build: 456 by difference, 458 by nm).
    functions = [n for n in model_syms if n in sizes and n != "model_lut"]
    assert abs(fig["flash_bytes"] - code_and_consts) <= 2 * len(functions)
    assert fig["flash_bytes"] >= 256          # the fixture's lookup table alone

    # tg_fake_lut stages through a 256-byte local array.
    assert 256 <= fig["stack_bytes"] <= 256 + 96

    # op 2 spins byte 0 times two instructions: samples 1 and 0 differ by 2 * (3 - 1).
    per_sample = fig["instructions_per_sample"]
    assert per_sample[1] - per_sample[0] == 4
    assert [row["op"] for row in fig["per_op"]] == [0, 1, 2]
    assert sum(row["instructions"] for row in fig["per_op"]) <= fig["instructions"]
    assert all(row["instructions"] > 0 for row in fig["per_op"])


def test_counts_repeat_exactly(tmp_path):
    inputs = [[bytes(range(16))]]
    first = emulate(FIXTURES / "addone", "model", "cortex-m4", inputs, requant_float=False)
    second = emulate(FIXTURES / "addone", "model", "cortex-m4", inputs, requant_float=False)
    assert first == second
    assert json_ready(first)["outputs"] == [[addone_expected(bytes(range(16))).hex()]]


@pytest.mark.parametrize("cpu", CPUS)
def test_counts_step_by_one_instruction(cpu):
    # tg_loop runs "subs; bne" n times: each extra iteration is exactly 2 instructions,
    # so single-instruction resolution shows as exact steps of 2.
    counts = [1, 2, 3, 4, 5, 6, 7, 8, 100, 12345]
    fig = emulate(FIXTURES / "spin", "spin", cpu, spin_samples(counts), requant_float=False)
    base = fig["instructions_per_sample"][0]
    assert [t - base for t in fig["instructions_per_sample"]] == [2 * (n - 1) for n in counts]
    assert [out[0] for out in fig["outputs"]] == [n.to_bytes(4, "little") for n in counts]


def test_per_op_count_scales_with_the_loop():
    small = emulate(FIXTURES / "spin", "spin", "cortex-m7", spin_samples([10]),
                    requant_float=False)
    large = emulate(FIXTURES / "spin", "spin", "cortex-m7", spin_samples([1010]),
                    requant_float=False)
    assert large["per_op"][0]["instructions"] - small["per_op"][0]["instructions"] == 2000
    assert large["instructions"] - small["instructions"] == 2000


def test_count_survives_timer_wrap():
    # 340M iterations = 680M instructions: the fine timer wraps once (2^32 ticks at
    # 6.4 ticks per instruction is 671M instructions); the coarse timer resolves it.
    n = 340_000_000
    fig = emulate(FIXTURES / "spin", "spin", "cortex-m3", spin_samples([1, n]),
                  requant_float=False, per_op=False)
    one, big = fig["instructions_per_sample"]
    assert big - one == 2 * (n - 1)


@pytest.mark.parametrize("opt", ["-Os", "-O2"])
def test_external_io_tree(opt):
    in0, in1 = bytes([1, 2, 3, 250, 255, 0]), bytes([0, 0xFF, 0x80])
    fig = emulate(FIXTURES / "door", "door", "cortex-m33", [[in0, in1]], requant_float=False,
                  opt=opt)
    w = [b - 256 if b > 127 else b for b in in1]
    acc = [in0[2 * j] + in0[2 * j + 1] - 1000 * w[j] for j in range(3)]
    want0 = b"".join(a.to_bytes(4, "little", signed=True) for a in acc)
    assert fig["outputs"] == [[want0, in0[::-1]]]
    assert fig["ram_bytes"] == 12 and fig["opt"] == opt
    assert [row["op"] for row in fig["per_op"]] == [0, 1]


def _door_with_io_functions(tmp_path: Path) -> Path:
    """The external-I/O door tree, plus door_input()/door_output() that return NULL, as an
    emitted header declares them in both I/O modes."""
    tree = tmp_path / "door_fn"
    shutil.copytree(FIXTURES / "door", tree)
    header = tree / "door.h"
    header.write_text(header.read_text().replace(
        "#endif /* DOOR_H */",
        "void *door_input(void *arena, int index);\n"
        "void *door_output(void *arena, int index);\n\n#endif /* DOOR_H */"))
    (tree / "door_io.c").write_text(
        "/* door_io.c - --io external: no I/O buffers in the arena. */\n"
        "#include <stddef.h>\n\n#include \"door.h\"\n\n"
        "void *door_input(void *arena, int index)\n{\n    (void)arena;\n    (void)index;\n"
        "    return NULL;\n}\n\n"
        "void *door_output(void *arena, int index)\n{\n    (void)arena;\n    (void)index;\n"
        "    return NULL;\n}\n")
    return tree


def test_io_mode_comes_from_the_model(tmp_path):
    tree = _door_with_io_functions(tmp_path)
    in0, in1 = bytes([9, 8, 7, 6, 5, 4]), bytes([1, 2, 3])
    fig = emulate(tree, "door", "cortex-m3", [[in0, in1]], requant_float=False)
    assert fig["io"] == "external" and fig["outputs"][0][1] == in0[::-1]
    assert emulate(FIXTURES / "addone", "model", "cortex-m3", [[bytes(16)]],
                   requant_float=False, per_op=False)["io"] == "arena"
    with pytest.raises(TinygenError, match="gave NULL"):
        emulate(tree, "door", "cortex-m3", [[in0, in1]], requant_float=False, io="arena")


def _tree_with_float_setting(tmp_path: Path, line: str) -> Path:
    """A copy of the addone tree whose tg_config.h has `line` for TG_WITH_FLOAT_REQUANT."""
    tree = tmp_path / f"tree_{abs(hash(line))}"
    shutil.copytree(FIXTURES / "addone", tree)
    config = tree / "tg_config.h"
    config.write_text(config.read_text().replace("#define TG_WITH_FLOAT_REQUANT 0", line))
    return tree


@pytest.mark.parametrize("cpu", ["cortex-m3", "cortex-m4"])
def test_float_requant_is_detected_unless_allowed(cpu, tmp_path):
    fixed_tree = FIXTURES / "addone"
    float_tree = _tree_with_float_setting(tmp_path, "#define TG_WITH_FLOAT_REQUANT 1")
    data = bytes(range(100, 116))
    fixed = emulate(fixed_tree, "model", cpu, [[data]], requant_float=False,
                    work_dir=tmp_path / "fixed")
    floating = emulate(float_tree, "model", cpu, [[data]], requant_float=True,
                       work_dir=tmp_path / "float")
    assert fixed["outputs"] == floating["outputs"] == [[addone_expected(data)]]
    assert fixed["forbidden_symbols"] == [] and fixed["float_instructions"] == []
    assert floating["forbidden_symbols"] == []          # float allowed in this build
    elf = tmp_path / "float" / "figures.elf"
    if cpu == "cortex-m3":   # no FPU: soft-float helpers get linked
        assert any(n.startswith("__aeabi_f") for n in
                   target.forbidden_symbols(elf, allow_float=False))
    else:                    # FPU: the conversions and the add are instructions
        assert any("vcvt" in insn for insn in target.float_instructions(elf))


def test_unset_requant_mode_comes_from_the_caller(tmp_path):
    tree = _tree_with_float_setting(tmp_path, "/* TG_WITH_FLOAT_REQUANT left to the build */")
    emulate(tree, "model", "cortex-m3", [[bytes(16)]], requant_float=True,
            work_dir=tmp_path / "build", per_op=False)
    elf = tmp_path / "build" / "figures.elf"
    assert target.forbidden_symbols(elf, allow_float=False)


def test_requant_mode_must_match_a_fixed_config():
    with pytest.raises(TinygenError, match="TG_WITH_FLOAT_REQUANT"):
        emulate(FIXTURES / "addone", "model", "cortex-m3", [[bytes(16)]], requant_float=True)


def test_wrong_input_size_is_refused():
    with pytest.raises(TinygenError, match="expected 16"):
        emulate(FIXTURES / "addone", "model", "cortex-m3", [[bytes(15)]], requant_float=False)


def _disassembly(elf: Path, function: str) -> list[str]:
    """Mnemonic and operands of each instruction of `function`, from objdump."""
    tools = find_toolchain()
    out = subprocess.run([tools.objdump, "-d", "--no-show-raw-insn", str(elf)],
                         capture_output=True, text=True, check=True).stdout
    body = out.split(f"<{function}>:\n", 1)[1].split("\n\n", 1)[0]
    rows = [line.split(":", 1)[1].strip() for line in body.splitlines() if ":" in line]
    return [r for r in rows if not r.startswith(".word")]


@pytest.mark.parametrize("opt", ["-Os", "-O2"])
def test_per_op_count_matches_the_disassembly(opt, tmp_path):
    # The per-op count must be exactly the instructions between the two hooks: counted
    # here from objdump's listing of spin_run (straight-line code between the hooks'
    # fixed sequences, "... strd" and "movw ..., #8192"), plus what tg_loop executes for
    # n iterations: its whole body once, then (subs, bne) n - 1 more times.
    n = 5
    fig = emulate(FIXTURES / "spin", "spin", "cortex-m4", spin_samples([n]),
                  requant_float=False, opt=opt, work_dir=tmp_path)
    run = _disassembly(tmp_path / "per_op.elf", "spin_run")
    begin = next(i for i, r in enumerate(run) if r.startswith("strd"))
    end = next(i for i, r in enumerate(run) if i > begin and r.startswith("movw")
               and "8192" in r)
    between = run[begin + 1:end]
    assert not any(r.startswith(("b.", "bne", "beq", "cb")) for r in between)
    loop = _disassembly(tmp_path / "per_op.elf", "tg_loop")
    count = len(between) + len(loop) + 2 * (n - 1)
    assert fig["per_op"] == [{"op": 0, "instructions": count, "instructions_per_sample": [count]}]
