"""Run an emitted tree on an emulated core (QEMU: MPS2 boards and the micro:bit for Cortex-M,
virt for 32-bit RISC-V) and measure what the model costs.

emulate() builds three images from the same firmware (tinygen/harness/firmware):
  figures  - the model as emitted: outputs, total instructions, stack, flash and RAM;
  per-op   - the model with TG_OP_BEGIN/TG_OP_END hooks counting each op;
  baseline - a stand-in model that does nothing, to subtract the firmware's own size.
See docs/target.md for what the figures mean.
"""
from __future__ import annotations

import os
import re
import shutil
import tempfile
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

from tinygen.errors import TinygenError
from tinygen.harness import target
from tinygen.harness.toolchain import Toolchain, find_toolchain

# Slots for a tree whose hooks take non-literal op indices (and so cannot be counted).
FALLBACK_OP_SLOTS = 4096
# tg_fw_mailbox_t without slots (tg_fw_op_hooks.h): 16 bytes on Arm, 24 on RISC-V (its
# stamp has three words); room for either.
_MAILBOX_HEADER_BYTES = 32
_MAILBOX_SLOT_BYTES = 16


@dataclass(frozen=True)
class ModelInfo:
    """What the harness needs to know about an emitted tree, read from its files."""

    prefix: str
    header: str                  # file name of <prefix>.h
    input_bytes: list[int]
    output_bytes: list[int]
    arena_bytes: int
    io_functions: bool           # the header declares <prefix>_input() and _output()
    io_mode: int                 # TG_FW_IO_MODE: 0 ask the model, 1 arena, 2 external
    op_count: int                # ops with hooks (highest literal index + 1)
    float_requant: int | None    # TG_WITH_FLOAT_REQUANT as tg_config.h sets it
    run_params: str              # parameter list of <prefix>_run() in the header


def _define(text: str, name: str, header: str) -> int:
    m = re.search(rf"^\s*#\s*define\s+{name}\s+\(?\s*(\d+)\s*[uU]?\s*\)?", text, re.M)
    if not m:
        raise TinygenError(f"{header}: no #define {name}")
    return int(m.group(1))


def _op_count(tree_dir: Path) -> int:
    text = "\n".join(p.read_text(errors="replace") for p in sorted(tree_dir.glob("*.c")))
    literal = [int(i) for i in re.findall(r"\bTG_OP_BEGIN\s*\(\s*(\d+)\s*\)", text)]
    if literal:
        return max(literal) + 1
    return FALLBACK_OP_SLOTS if "TG_OP_BEGIN" in text else 0


def _float_requant_setting(tree_dir: Path) -> int | None:
    config = tree_dir / "tg_config.h"
    text = config.read_text() if config.exists() else ""
    m = re.search(r"^\s*#\s*define\s+TG_WITH_FLOAT_REQUANT\s+(\d)", text, re.M)
    return int(m.group(1)) if m else None


def _run_params(text: str, prefix: str, header: str) -> str:
    m = re.search(rf"\bint\s+{prefix}_run\s*\(([^)]*)\)\s*;", text)
    if not m:
        raise TinygenError(f"{header}: no declaration of int {prefix}_run(...)")
    return " ".join(m.group(1).split())


def read_model_info(tree_dir: Path, prefix: str = "model", io: str | None = None) -> ModelInfo:
    """Read sizes and modes from <prefix>.h and tg_config.h of an emitted tree.

    io: "arena", "external", or None to let the firmware ask the model: arena I/O when
    <prefix>_input(NULL, 0) gives a buffer (a header may declare it in both modes)."""
    tree_dir = Path(tree_dir)
    header = f"{prefix}.h"
    path = tree_dir / header
    if not path.exists():
        raise TinygenError(f"{tree_dir}: no {header} (wrong prefix?)")
    text = path.read_text()
    up = prefix.upper()
    n_in = _define(text, f"{up}_NUM_INPUTS", header)
    n_out = _define(text, f"{up}_NUM_OUTPUTS", header)
    functions = all(re.search(rf"\b{prefix}_{name}\s*\(", text) for name in ("input", "output"))
    modes = {None: 0 if functions else 2, "arena": 1, "external": 2}
    if io not in modes:
        raise TinygenError(f"io must be 'arena' or 'external', not '{io}'")
    if io == "arena" and not functions:
        raise TinygenError(f"{header}: --io arena needs {prefix}_input() and {prefix}_output()")
    return ModelInfo(
        prefix=prefix, header=header,
        input_bytes=[_define(text, f"{up}_INPUT_{i}_BYTES", header) for i in range(n_in)],
        output_bytes=[_define(text, f"{up}_OUTPUT_{i}_BYTES", header) for i in range(n_out)],
        arena_bytes=_define(text, f"{up}_ARENA_BYTES", header),
        io_functions=functions, io_mode=modes[io], op_count=_op_count(tree_dir),
        float_requant=_float_requant_setting(tree_dir),
        run_params=_run_params(text, prefix, header))


# ---------------------------------------------------------------------------- generated C


def _offsets(sizes: list[int], start: int = 0) -> list[int]:
    out, at = [], start
    for size in sizes:
        out.append(at)
        at += (size + 7) // 8 * 8
    return out


def glue_header(info: ModelInfo) -> str:
    """tg_fw_glue.h: the model's names and I/O layout for the firmware, with compile-time
    checks that the header says what the host read from it."""
    up, p = info.prefix.upper(), info.prefix
    in_off = _offsets(info.input_bytes)
    out_start = in_off[-1] + (info.input_bytes[-1] + 7) // 8 * 8 if in_off else 0
    out_off = _offsets(info.output_bytes, out_start)
    storage = (out_off[-1] + info.output_bytes[-1]) if out_off else out_start

    def lst(values: list[int]) -> str:
        return ", ".join(f"{v}u" for v in values)

    checks = [f"typedef char tg_fw_agrees_num_inputs[({up}_NUM_INPUTS == "
              f"{len(info.input_bytes)}) ? 1 : -1];",
              f"typedef char tg_fw_agrees_num_outputs[({up}_NUM_OUTPUTS == "
              f"{len(info.output_bytes)}) ? 1 : -1];"]
    checks += [f"typedef char tg_fw_agrees_input_{i}[({up}_INPUT_{i}_BYTES == {n}u) ? 1 : -1];"
               for i, n in enumerate(info.input_bytes)]
    checks += [f"typedef char tg_fw_agrees_output_{i}[({up}_OUTPUT_{i}_BYTES == {n}u) ? 1 : -1];"
               for i, n in enumerate(info.output_bytes)]
    body = "\n".join(checks)
    names = [re.findall(r"\w+", part)[-1] for part in info.run_params.split(",")]
    unused = " ".join(f"(void){n};" for n in names)
    return f"""/* tg_fw_glue.h - generated by tinygen/emulate.py for prefix "{p}". */
#ifndef TG_FW_GLUE_H
#define TG_FW_GLUE_H

#include <stdint.h>

#include "{info.header}"

#define TG_FW_RUN {p}_run
#define TG_FW_RUN_PARAMS {info.run_params}
#define TG_FW_RUN_UNUSED {unused}
#define TG_FW_INPUT {p}_input
#define TG_FW_OUTPUT {p}_output
#define TG_FW_HAS_IO_FUNCTIONS {1 if info.io_functions else 0}
#define TG_FW_IO_MODE {info.io_mode}
#define TG_FW_NUM_INPUTS {len(info.input_bytes)}u
#define TG_FW_NUM_OUTPUTS {len(info.output_bytes)}u
#define TG_FW_INPUT_BYTES_LIST {lst(info.input_bytes)}
#define TG_FW_OUTPUT_BYTES_LIST {lst(info.output_bytes)}
#define TG_FW_INPUT_OFFSET_LIST {lst(in_off)}
#define TG_FW_OUTPUT_OFFSET_LIST {lst(out_off)}
#define TG_FW_IO_STORAGE_BYTES {storage}u

/* A negative array size here means {info.header} disagrees with the host's reading. */
{body}

#endif /* TG_FW_GLUE_H */
"""


def samples_header(info: ModelInfo, inputs: list[list[bytes]]) -> str:
    """tg_fw_samples.h: every sample's input bytes, back to back, in input order."""
    blob = bytearray()
    for s, sample in enumerate(inputs):
        if len(sample) != len(info.input_bytes):
            raise TinygenError(f"sample {s}: {len(sample)} inputs given, the model has "
                               f"{len(info.input_bytes)}")
        for i, (data, want) in enumerate(zip(sample, info.input_bytes, strict=True)):
            if len(data) != want:
                raise TinygenError(f"sample {s} input {i}: {len(data)} bytes, expected {want}")
            blob += bytes(data)
    rows = [", ".join(f"0x{b:02x}" for b in blob[i:i + 16]) for i in range(0, len(blob), 16)]
    data = ",\n    ".join(rows)
    return f"""/* tg_fw_samples.h - generated by tinygen/emulate.py: {len(inputs)} sample(s). */
#ifndef TG_FW_SAMPLES_H
#define TG_FW_SAMPLES_H

#include <stdint.h>

#define TG_FW_NUM_SAMPLES {len(inputs)}u

static const uint8_t tg_fw_samples[{len(blob)}] = {{
    {data}
}};

#endif /* TG_FW_SAMPLES_H */
"""


# ---------------------------------------------------------------------------- builds


@dataclass
class _Build:
    tools: Toolchain
    board: target.Board
    opt: str
    work: Path
    tree_dir: Path

    def obj(self, source: Path, group: str, flags: list[str]) -> Path:
        return target.compile_c(source, self.work / group / f"{source.stem}.o", self.board,
                                opt=self.opt, flags=flags, tools=self.tools)

    def firmware_flags(self, extra: list[str] | None = None) -> list[str]:
        return [*target.firmware_defines(self.board), *target.FIRMWARE_ONLY_FLAGS,
                f"-I{self.work}", f"-I{target.FIRMWARE_DIR}", f"-I{self.tree_dir}",
                *(extra or [])]


def _requant_flags(info: ModelInfo, requant_float: bool) -> list[str]:
    """The tree's own setting wins (its tables were emitted for it); only a tree that
    leaves TG_WITH_FLOAT_REQUANT unset gets it from requant_float."""
    want = 1 if requant_float else 0
    if info.float_requant is None:
        return [f"-DTG_WITH_FLOAT_REQUANT={want}"]
    if info.float_requant != want:
        raise TinygenError(f"tree was emitted with TG_WITH_FLOAT_REQUANT {info.float_requant} "
                           f"but requant_float={requant_float}")
    return []


def _compile_all(b: _Build, jobs: list[tuple[Path, str, list[str]]]) -> list[Path]:
    """Compile (source, group, flags) jobs, two at a time: the compiles dominate a run."""
    workers = min(2, os.cpu_count() or 1)
    with ThreadPoolExecutor(max_workers=workers) as pool:
        return list(pool.map(lambda job: b.obj(*job), jobs))


def _build_images(b: _Build, info: ModelInfo, requant_float: bool, per_op: bool,
                  stack_bytes: int) -> dict[str, Path]:
    fw = target.FIRMWARE_DIR
    tree_flags = [f"-I{b.tree_dir}", *_requant_flags(info, requant_float)]
    sources = target.tree_sources(b.tree_dir)
    jobs = [(fw / b.board.startup_source, "fw", b.firmware_flags()),
            (fw / "tg_fw_semihost.c", "fw", b.firmware_flags()),
            (fw / "tg_fw_meas_main.c", "fw", b.firmware_flags()),
            (fw / "tg_fw_dummy_model.c", "fw", b.firmware_flags())]
    jobs += [(src, "tree", tree_flags) for src in sources]
    slots = info.op_count + 1
    with_ops = per_op and info.op_count > 0
    if with_ops:
        hooks = [f"-DTG_FW_OP_SLOTS={slots}u", *target.firmware_defines(b.board),
                 f"-I{fw}", "-include", "tg_fw_op_hooks.h"]
        jobs.append((fw / "tg_fw_meas_main.c", "fw_ops",
                     b.firmware_flags(["-DTG_FW_PER_OP=1", f"-DTG_FW_OP_SLOTS={slots}u"])))
        jobs += [(src, "tree_ops", [*tree_flags, *hooks]) for src in sources]
    objs = _compile_all(b, jobs)
    startup, semihost, main, dummy = objs[:4]
    tree = objs[4:4 + len(sources)]
    common = [startup, semihost]

    def image(name: str, objects: list[Path], mailbox: int = 0) -> Path:
        elf = b.work / f"{name}.elf"
        stack = stack_bytes
        if b.board.ram_bytes:
            stack = _stack_that_fits(b, objects, elf, mailbox)
        return target.link(objects, elf, b.board, opt=b.opt, stack_bytes=stack,
                           mailbox_bytes=mailbox, tools=b.tools)

    images = {"figures": image("figures", [*tree, main, *common]),
              "baseline": image("baseline", [dummy, main, *common])}
    if with_ops:
        main_ops, tree_ops = objs[4 + len(sources)], objs[5 + len(sources):]
        mailbox = _MAILBOX_HEADER_BYTES + _MAILBOX_SLOT_BYTES * slots
        images["per_op"] = image("per_op", [*tree_ops, main_ops, *common], mailbox)
    return images


class _DoesNotFit(Exception):
    """The image does not fit the board's RAM (with at least MIN_STACK_BYTES of stack)."""


# Below this the measurement firmware itself (main's frame with the I/O buffers, one
# report line) has no room; a model that leaves less runs on the larger board.
MIN_STACK_BYTES = 1024


def _stack_that_fits(b: _Build, objects: list[Path], elf: Path, mailbox: int) -> int:
    """The stack a board with little RAM can give: its RAM less everything else the image
    places there, from a trial link with no stack. Raises _DoesNotFit."""
    try:
        target.link(objects, elf, b.board, opt=b.opt, stack_bytes=0, mailbox_bytes=mailbox,
                    tools=b.tools)
    except TinygenError as exc:
        over = re.search(r"region .(RAM|CODE). overflowed by (\d+) bytes", exc.reason)
        if over:   # CODE: the micro:bit's 256 KiB of flash
            raise _DoesNotFit(f"{over.group(1)} overflowed by {over.group(2)} bytes"
                              + (" with no stack" if over.group(1) == "RAM" else "")) from None
        raise
    used = sum(size for name, size, flags in target.section_table(elf, b.tools)
               if "ALLOC" in flags and "READONLY" not in flags)
    stack = (b.board.ram_bytes - used - 32) // 16 * 16   # 32: the sections' alignment gaps
    if stack < MIN_STACK_BYTES:
        raise _DoesNotFit(f"{used} bytes of RAM besides the stack")
    return stack


def _run(elf: Path, board: target.Board, timeout: float,
         tools: Toolchain) -> target.FirmwareReport:
    result = target.run_elf(elf, board, timeout=timeout, tools=tools)
    report = target.parse_report(result.stdout)
    lockup = result.status != 0 and "Lockup" in result.stderr
    if board.ram_bytes and (report.fault or lockup
                            or any(s.stack_overflow for s in report.samples)):
        # The stack is all the RAM the model left, and its bottom is the end of RAM: an
        # overflow shows as a fault there, as clobbered paint, or (Armv6-M, when the
        # fault's own exception frame cannot be stacked) as QEMU's lockup exit.
        raise _DoesNotFit(f"the stack left in {board.ram_bytes} bytes of RAM overflowed "
                          f"(fault: {report.fault or ('lockup' if lockup else 'none')})")
    target.check_report(report, result, board)
    return report


def _outputs(report: target.FirmwareReport, info: ModelInfo) -> list[list[bytes]]:
    out = []
    for s, sample in enumerate(report.samples):
        got = [bytes(sample.outputs.get(i, b"")) for i in range(len(info.output_bytes))]
        for i, (data, want) in enumerate(zip(got, info.output_bytes, strict=True)):
            if len(data) != want:
                raise TinygenError(f"sample {s} output {i}: firmware sent {len(data)} bytes, "
                                   f"expected {want}")
        out.append(got)
    return out


def _model_footprint(images: dict[str, Path], info: ModelInfo,
                     tools: Toolchain) -> tuple[int, int]:
    flash, ram = target.footprint(images["figures"], tools)
    base_flash, base_ram = target.footprint(images["baseline"], tools)
    # The baseline carries the stand-in's stubs; the model build does not.
    stubs = target.symbol_sizes(images["baseline"], tools)
    names = [f"{info.prefix}_run"] + ([f"{info.prefix}_input", f"{info.prefix}_output"]
                                      if info.io_functions else [])
    stub_bytes = sum(stubs.get(n, 0) for n in names)
    return flash - base_flash + stub_bytes, ram - base_ram


def _per_op(report: target.FirmwareReport) -> list[dict]:
    """Per op: instructions of sample 0 ("instructions") and of every sample."""
    ops = sorted({op for s in report.samples for op in s.ops})
    rows = []
    for op in ops:
        counts = []
        for s in report.samples:
            calls, instructions = s.ops.get(op, (0, 0))
            counts.append(instructions - calls * report.op_calibration)
        rows.append({"op": op, "instructions": counts[0], "instructions_per_sample": counts})
    return rows


def emulate(tree_dir, prefix: str, cpu: str, inputs: list[list[bytes]], *,
            requant_float: bool, opt: str = "-Os", io: str | None = None,
            per_op: bool = True, timeout: float = target.DEFAULT_TIMEOUT_S,
            stack_bytes: int = target.DEFAULT_STACK_BYTES, work_dir=None) -> dict:
    """Build the tree for `cpu`, run every sample of `inputs` on QEMU, return the figures.

    inputs[s][i] is the raw bytes of input i for sample s. requant_float must match the
    tree's TG_WITH_FLOAT_REQUANT (it sets it only where the tree leaves it unset) and
    decides whether float symbols are allowed. io: None asks the model at run time,
    "arena" or "external" insist. opt: -Os, -O2, ... for every file. timeout: seconds per
    QEMU run. work_dir keeps the build (images, maps) there; by default a temporary one is
    removed.

    The result is JSON-ready except "outputs" (outputs[s][o] = raw bytes of output o);
    "bit_exact" is None for the caller to fill in. Instructions are exact counts of
    executed instructions (not cycles) for sample 0; "instructions_per_sample" has all.
    flash/RAM are the model's alone. docs/target.md has every key.
    """
    board = target.board_for(cpu)
    tree_dir = Path(tree_dir).resolve()
    info = read_model_info(tree_dir, prefix, io)
    if not inputs:
        raise TinygenError("emulate needs at least one sample of inputs")
    work = Path(work_dir) if work_dir else Path(tempfile.mkdtemp(prefix="tinygen-target-"))
    work.mkdir(parents=True, exist_ok=True)
    try:
        (work / "tg_fw_glue.h").write_text(glue_header(info))
        (work / "tg_fw_samples.h").write_text(samples_header(info, inputs))
        try:
            return _emulate_on(board, work, tree_dir, info, requant_float=requant_float,
                               opt=opt, per_op=per_op, timeout=timeout, stack_bytes=stack_bytes)
        except _DoesNotFit as exc:
            larger = target.larger_board(board)
            if larger is None:
                raise TinygenError(f"{board.machine}: the model does not fit ({exc})") from None
            figures = _emulate_on(larger, work / larger.machine, tree_dir, info,
                                  requant_float=requant_float, opt=opt, per_op=per_op,
                                  timeout=timeout, stack_bytes=stack_bytes)
            figures["board_reason"] = (f"does not fit {board.machine} "
                                       f"({board.ram_bytes // 1024} KiB RAM): {exc}")
            return figures
    finally:
        if not work_dir:
            shutil.rmtree(work, ignore_errors=True)


def _emulate_on(board: target.Board, work: Path, tree_dir: Path, info: ModelInfo, *,
                requant_float: bool, opt: str, per_op: bool, timeout: float,
                stack_bytes: int) -> dict:
    """emulate() on one board; raises _DoesNotFit when a small board's RAM is too small."""
    tools = find_toolchain(board.arch)
    work.mkdir(parents=True, exist_ok=True)
    for name in ("tg_fw_glue.h", "tg_fw_samples.h"):   # a second board's build: a subdir
        if not (work / name).exists():
            shutil.copyfile(work.parent / name, work / name)
    build = _Build(tools, board, opt, work, tree_dir)
    images = _build_images(build, info, requant_float, per_op, stack_bytes)
    report = _run(images["figures"], board, timeout, tools)
    outputs = _outputs(report, info)
    per_op_rows: list[dict] = []
    if "per_op" in images:
        op_report = _run(images["per_op"], board, timeout, tools)
        if _outputs(op_report, info) != outputs:
            raise TinygenError("outputs differ between the plain and the per-op build")
        per_op_rows = _per_op(op_report)
    flash, ram = _model_footprint(images, info, tools)
    totals = [s.instructions - report.calibration for s in report.samples]
    return {
        "cpu": board.cpu, "board": board.machine, "board_reason": "", "opt": opt,
        "bit_exact": None,
        "io": "arena" if report.io_arena else "external",
        "flash_bytes": flash, "ram_bytes": ram, "arena_bytes": info.arena_bytes,
        "stack_bytes": max(s.stack_bytes for s in report.samples),
        "instructions": totals[0], "instructions_per_sample": totals,
        "per_op": per_op_rows,
        "forbidden_symbols": target.forbidden_symbols(images["figures"],
                                                      allow_float=requant_float,
                                                      tools=tools, board=board),
        "float_instructions": ([] if requant_float else
                               target.float_instructions(images["figures"], tools)),
        "outputs": outputs,
    }


def json_ready(figures: dict) -> dict:
    """A copy of emulate()'s result with the raw outputs as hex strings."""
    out = dict(figures)
    out["outputs"] = [[data.hex() for data in sample] for sample in figures["outputs"]]
    return out
