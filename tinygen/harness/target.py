"""Build C for Cortex-M (arm-none-eabi-gcc) or 32-bit RISC-V (riscv64-unknown-elf-gcc) and
run it on QEMU: MPS2 boards and the micro:bit for Arm, the virt machine for RISC-V.

The pieces here are generic (compile, link, run, read the firmware's report, inspect an
image); tinygen/emulate.py puts them together for an emitted tree. docs/target.md says
what the instruction counts are and are not.
"""
from __future__ import annotations

import re
import subprocess
from dataclasses import dataclass, field
from fractions import Fraction
from pathlib import Path

from tinygen.errors import TinygenError
from tinygen.harness.cbuild import STRICT_FLAGS
from tinygen.harness.toolchain import Toolchain, find_toolchain
from tinygen.resources import firmware_dir

FIRMWARE_DIR = firmware_dir()

# Virtual time per instruction is 2^ICOUNT_SHIFT ns; 256 ns makes a timer tick (40 or
# 50 ns) shorter than half an instruction, which is what makes the counts exact.
ICOUNT_SHIFT = 8
FAULT_STATUS = 250          # tg_fw_startup.c
DEFAULT_STACK_BYTES = 64 * 1024
DEFAULT_TIMEOUT_S = 30.0

# Section flags only the firmware needs; the tree gets them too so --gc-sections can
# drop unused kernels, as it would in a real firmware build.
SECTION_FLAGS = ["-ffunction-sections", "-fdata-sections"]
# Keep gcc from turning the firmware's own copy loops into memcpy calls, which would
# otherwise land in the baseline and hide the model's use of memcpy.
FIRMWARE_ONLY_FLAGS = ["-fno-tree-loop-distribute-patterns"]
HARNESS_SECTIONS = {".stack", ".tg_fw_mailbox"}


@dataclass(frozen=True)
class Board:
    """One QEMU machine and the compiler flags for its core."""

    cpu: str
    machine: str
    cpu_flags: tuple[str, ...]
    linker_script: str
    board_define: str
    timer_hz: int            # clock of the fine counter the firmware reads (tg_fw_counter.h)
    arch: str = "arm"        # "arm" or "riscv": which toolchain and startup file
    ram_bytes: int = 0       # RAM the whole image must fit in (stack sized to the rest);
                             # 0: ample, the stack gets DEFAULT_STACK_BYTES
    larger: str = ""         # key of LARGER_BOARDS that runs the same code with more RAM

    @property
    def tick(self) -> Fraction:
        """The fine counter's period in ns (31.25 for the AN547's 32 MHz counter)."""
        return Fraction(1_000_000_000, self.timer_hz)

    @property
    def tick_ns(self) -> int:
        """The period's numerator; the firmware divides by 2^tick_log2_den (a power of two)."""
        return self.tick.numerator

    @property
    def tick_log2_den(self) -> int:
        den = self.tick.denominator
        if den & (den - 1):
            raise TinygenError(f"{self.machine}: timer period {self.tick} ns has a denominator "
                               "that is not a power of two")
        return den.bit_length() - 1

    @property
    def hard_float(self) -> bool:
        return "-mfloat-abi=hard" in self.cpu_flags

    @property
    def startup_source(self) -> str:
        """The firmware file with this board's reset and fault handling."""
        return "tg_fw_rv_startup.c" if self.arch == "riscv" else "tg_fw_startup.c"

    @property
    def long_multiply_helpers(self) -> frozenset[str]:
        """Library helpers of a 64-bit multiply, which fixed builds for a core without a
        32x32->64 multiply instruction must not call (tg_armv6m.h avoids them)."""
        if self.arch == "arm" and self.cpu in ARMV6M_CPUS:
            return frozenset({"__aeabi_lmul", "__muldi3"})
        return frozenset({"__muldi3"}) if self.arch == "riscv" else frozenset()


# Armv6-M: no DSP, no long multiply, no divide. QEMU models the Cortex-M0 only; the M0+
# runs the same instruction set, so its code runs on the same boards.
ARMV6M_CPUS = ("cortex-m0", "cortex-m0plus")
_ARMV6M_FLAGS = {cpu: (f"-mcpu={cpu}", "-mthumb", "-mfloat-abi=soft") for cpu in ARMV6M_CPUS}
MICROBIT_RAM_BYTES = 16 * 1024
# RISC-V: Debian's rv32 libraries (libgcc, picolibc) come for rv32im and rv32imac; gcc
# links rv32imc code against the rv32im ones (no compressed instructions in the library).
_RV_FLAGS = {arch: (f"-march={arch}", "-mabi=ilp32") for arch in ("rv32imc", "rv32imac")}

BOARDS: dict[str, Board] = {
    "cortex-m0": Board("cortex-m0", "microbit", _ARMV6M_FLAGS["cortex-m0"], "microbit.ld",
                       "TG_FW_BOARD_MICROBIT", 8_000_000, ram_bytes=MICROBIT_RAM_BYTES,
                       larger="cortex-m0"),
    "cortex-m0plus": Board("cortex-m0plus", "microbit", _ARMV6M_FLAGS["cortex-m0plus"],
                           "microbit.ld", "TG_FW_BOARD_MICROBIT", 8_000_000,
                           ram_bytes=MICROBIT_RAM_BYTES, larger="cortex-m0plus"),
    "cortex-m3": Board("cortex-m3", "mps2-an385", ("-mcpu=cortex-m3", "-mthumb",
                       "-mfloat-abi=soft"), "mps2_an385.ld", "TG_FW_BOARD_AN385", 25_000_000),
    "cortex-m4": Board("cortex-m4", "mps2-an386", ("-mcpu=cortex-m4", "-mthumb",
                       "-mfpu=fpv4-sp-d16", "-mfloat-abi=hard"), "mps2_an386.ld",
                       "TG_FW_BOARD_AN386", 25_000_000),
    "cortex-m7": Board("cortex-m7", "mps2-an500", ("-mcpu=cortex-m7", "-mthumb",
                       "-mfpu=fpv5-d16", "-mfloat-abi=hard"), "mps2_an500.ld",
                       "TG_FW_BOARD_AN500", 25_000_000),
    "cortex-m33": Board("cortex-m33", "mps2-an505", ("-mcpu=cortex-m33", "-mthumb",
                        "-mfpu=fpv5-sp-d16", "-mfloat-abi=hard"), "mps2_an505.ld",
                        "TG_FW_BOARD_AN505", 20_000_000),
    # Armv8.1-M with MVE (Helium); the SSE-300's system counter runs at 32 MHz.
    "cortex-m55": Board("cortex-m55", "mps3-an547", ("-mcpu=cortex-m55", "-mthumb",
                        "-mfloat-abi=hard"), "mps3_an547.ld", "TG_FW_BOARD_AN547", 32_000_000),
    # minstret under -icount counts virtual nanoseconds: a 1 GHz "timer".
    "rv32imc": Board("rv32imc", "virt", _RV_FLAGS["rv32imc"], "tg_fw_rv_virt.ld",
                     "TG_FW_BOARD_RV_VIRT", 1_000_000_000, arch="riscv"),
    "rv32imac": Board("rv32imac", "virt", _RV_FLAGS["rv32imac"], "tg_fw_rv_virt.ld",
                      "TG_FW_BOARD_RV_VIRT", 1_000_000_000, arch="riscv"),
}

# Where a model too big for the micro:bit's 16 KiB runs: the AN385 (4 MiB of RAM), whose
# Cortex-M3 executes the same Armv6-M image instruction for instruction (Armv6-M is a
# subset of Armv7-M; QEMU 7.2 accepts no other core on that board). The compiler and
# assembler, given -mcpu=cortex-m0[plus], have already refused anything outside Armv6-M.
LARGER_BOARDS: dict[str, Board] = {
    cpu: Board(cpu, "mps2-an385", _ARMV6M_FLAGS[cpu], "mps2_an385.ld", "TG_FW_BOARD_AN385",
               25_000_000)
    for cpu in ARMV6M_CPUS
}


def board_for(cpu: str) -> Board:
    """The board used for `cpu` (one of BOARDS)."""
    try:
        return BOARDS[cpu]
    except KeyError:
        raise TinygenError(f"unknown cpu '{cpu}'; choose one of {', '.join(BOARDS)}") from None


def larger_board(board: Board) -> Board | None:
    """The board with more RAM that runs `board`'s code, or None."""
    return LARGER_BOARDS.get(board.larger) if board.larger else None


def firmware_defines(board: Board) -> list[str]:
    """-D flags every firmware source needs (board addresses, counter scaling)."""
    return [f"-D{board.board_define}", f"-DTG_FW_TICK_NS={board.tick_ns}u",
            f"-DTG_FW_TICK_LOG2_DEN={board.tick_log2_den}",
            f"-DTG_FW_ICOUNT_SHIFT={ICOUNT_SHIFT}"]


# ---------------------------------------------------------------------------- build


def _first_lines(text: str, count: int = 3) -> str:
    lines = [line for line in text.strip().splitlines() if line.strip()]
    return " | ".join(lines[:count]) or "(no output)"


def compile_c(source: Path, obj: Path, board: Board, *, opt: str = "-Os",
              flags: list[str] | None = None, tools: Toolchain | None = None) -> Path:
    """Compile one C file for `board` with the strict warning set; raise on any diagnostic."""
    tools = tools or find_toolchain(board.arch)
    obj.parent.mkdir(parents=True, exist_ok=True)
    cmd = [tools.gcc, *board.cpu_flags, *_libc_specs(board), opt, *STRICT_FLAGS,
           *SECTION_FLAGS, *(flags or []), "-c", str(source), "-o", str(obj)]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    if proc.returncode != 0 or proc.stderr.strip():
        raise TinygenError(f"{Path(tools.gcc).name} {opt} for {board.cpu} failed on "
                           f"{source.name}: {_first_lines(proc.stderr)}")
    return obj


def _libc_specs(board: Board) -> list[str]:
    """The C library's specs: newlib-nano for Arm (at link time only, as before), picolibc
    for RISC-V (its headers too)."""
    return ["--specs=picolibc.specs"] if board.arch == "riscv" else []


def tree_sources(tree_dir: Path) -> list[Path]:
    """The C files of an emitted tree (flat directory)."""
    sources = sorted(Path(tree_dir).glob("*.c"))
    if not sources:
        raise TinygenError(f"{tree_dir}: no .c files; not an emitted tree")
    return sources


def check_tree_compiles(tree_dir: Path, cpu: str, opt: str, out_dir: Path,
                        extra_flags: list[str] | None = None) -> list[Path]:
    """Compile every file of the tree warning-free (-Werror) for `cpu`; returns objects."""
    board = board_for(cpu)
    tree_dir = Path(tree_dir)
    flags = [f"-I{tree_dir}", *(extra_flags or [])]
    return [compile_c(src, Path(out_dir) / f"{src.stem}.o", board, opt=opt, flags=flags)
            for src in tree_sources(tree_dir)]


def link(objects: list[Path], elf: Path, board: Board, *, opt: str = "-Os",
         stack_bytes: int = DEFAULT_STACK_BYTES, mailbox_bytes: int = 0,
         tools: Toolchain | None = None) -> Path:
    """Link objects with the board's linker script and its C library (newlib-nano for Arm,
    picolibc for RISC-V), no start files."""
    tools = tools or find_toolchain(board.arch)
    specs = _libc_specs(board) or ["--specs=nano.specs"]
    cmd = [tools.gcc, *board.cpu_flags, opt, "-nostartfiles", *specs,
           "-Wl,--gc-sections", f"-Wl,-Map={elf.with_suffix('.map')}",
           f"-L{FIRMWARE_DIR}", "-T", board.linker_script,
           f"-Wl,--defsym=tg_fw_stack_bytes={stack_bytes}",
           f"-Wl,--defsym=tg_fw_mailbox_bytes={mailbox_bytes}",
           *map(str, objects), "-o", str(elf)]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    if proc.returncode != 0:
        raise TinygenError(f"link for {board.cpu} failed: {_first_lines(proc.stderr)}")
    return elf


# ---------------------------------------------------------------------------- run


@dataclass
class RunResult:
    status: int
    stdout: str
    stderr: str


def qemu_command(elf: Path, board: Board, tools: Toolchain) -> list[str]:
    """QEMU invocation: instruction-counted virtual time, semihosting on stdout, no devices
    on the host side."""
    # virt: no firmware; QEMU's reset code jumps to the start of RAM, where the image starts.
    firmware = ["-bios", "none"] if board.arch == "riscv" else []
    return [tools.qemu, "-M", board.machine, *firmware, "-kernel", str(elf),
            "-icount", f"shift={ICOUNT_SHIFT},align=off,sleep=off",
            "-chardev", "stdio,id=tgsh",
            "-semihosting-config", "enable=on,target=native,chardev=tgsh",
            "-display", "none", "-monitor", "none", "-serial", "none",
            "-nodefaults", "-no-reboot"]


def run_elf(elf: Path, board: Board, *, timeout: float = DEFAULT_TIMEOUT_S,
            tools: Toolchain | None = None) -> RunResult:
    """Run an image to its semihosting exit; raise if QEMU fails to start or times out."""
    tools = tools or find_toolchain(board.arch)
    cmd = qemu_command(elf, board, tools)
    try:
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout,
                              stdin=subprocess.DEVNULL)
    except subprocess.TimeoutExpired:
        raise TinygenError(f"{board.machine}: {elf.name} did not exit within {timeout:g} s "
                           "(hang, or a model too slow for the timeout)") from None
    return RunResult(proc.returncode, proc.stdout, proc.stderr)


# ---------------------------------------------------------------------------- report


@dataclass
class SampleReport:
    """What the measurement firmware printed for one sample."""

    status: int = 0
    instructions: int = 0       # from before to after the call, before calibration
    stack_bytes: int = 0
    stack_overflow: bool = False
    outputs: dict[int, bytearray] = field(default_factory=dict)
    ops: dict[int, tuple[int, int]] = field(default_factory=dict)  # op -> (calls, instr)


@dataclass
class FirmwareReport:
    calibration: int = 0        # instructions between two back-to-back stamps
    op_calibration: int = 0     # instructions of an empty TG_OP_BEGIN/END pair
    io_arena: bool = False      # the model's I/O buffers are in its arena
    io_missing: int = 0         # arena I/O asked for, buffers the model did not give
    samples: list[SampleReport] = field(default_factory=list)
    disagree: int = 0
    out_of_range: int = 0
    finished: bool = False
    fault: str = ""


def _u64(hi: str, lo: str) -> int:
    return (int(hi, 16) << 32) | int(lo, 16)


def _signed32(value: str) -> int:
    v = int(value, 16)
    return v - (1 << 32) if v & 0x80000000 else v


def _parse_line(report: FirmwareReport, words: list[str]) -> None:
    kind, args = words[1], words[2:]
    if kind == "BEGIN":
        report.samples = [SampleReport() for _ in range(int(args[0], 16))]
        report.calibration = _u64(args[1], args[2])
        report.op_calibration = _u64(args[3], args[4])
        report.io_arena = int(args[5], 16) != 0
        report.io_missing = int(args[6], 16)
    elif kind == "SAMPLE":
        s = report.samples[int(args[0], 16)]
        s.status = _signed32(args[1])
        s.instructions = _u64(args[2], args[3])
        s.stack_bytes = int(args[4], 16)
        s.stack_overflow = int(args[5], 16) != 0
    elif kind == "OUT":
        s = report.samples[int(args[0], 16)]
        buf = s.outputs.setdefault(int(args[1], 16), bytearray())
        if len(buf) != int(args[2], 16):
            raise TinygenError("firmware report: output chunks out of order")
        buf += bytes.fromhex(args[3])
    elif kind == "OP":
        s = report.samples[int(args[0], 16)]
        s.ops[int(args[1], 16)] = (int(args[2], 16), _u64(args[3], args[4]))
    elif kind == "END":
        report.disagree = int(args[0], 16)
        report.out_of_range = int(args[1], 16)
        report.finished = True
    elif kind == "FAULT":
        report.fault = " ".join(args)


def parse_report(text: str) -> FirmwareReport:
    """Read the "TGFW ..." lines of the measurement firmware (tg_fw_meas_main.c)."""
    report = FirmwareReport()
    for line in text.splitlines():
        words = line.split()
        if len(words) >= 2 and words[0] == "TGFW":
            try:
                _parse_line(report, words)
            except (IndexError, ValueError) as exc:
                raise TinygenError(f"firmware report: unreadable line {line!r}") from exc
    return report


def check_report(report: FirmwareReport, result: RunResult, board: Board) -> None:
    """Raise TinygenError unless the run finished cleanly with sane counter readings."""
    where = f"{board.machine} ({board.cpu})"
    if report.io_missing:
        raise TinygenError(f"{where}: arena I/O asked for, but the model's _input()/_output() "
                           "gave NULL (emitted with --io external?)")
    if report.fault:
        names = "mcause mepc mtval -" if board.arch == "riscv" else "ipsr pc cfsr hfsr"
        raise TinygenError(f"{where}: firmware faulted ({names} = {report.fault})")
    if result.status != 0 or not report.finished:
        raise TinygenError(f"{where}: firmware exited with status {result.status} before "
                           f"finishing; stderr: {_first_lines(result.stderr)}")
    if report.disagree:
        raise TinygenError(f"{where}: fine and coarse timers disagree; counts unreliable")
    if report.out_of_range:
        raise TinygenError(f"{where}: {report.out_of_range} TG_OP_END index(es) beyond the "
                           "op slots; per-op counts incomplete")
    if report.calibration <= 0:
        raise TinygenError(f"{where}: the instruction counter is not running")
    for index, sample in enumerate(report.samples):
        if sample.stack_overflow:
            raise TinygenError(f"{where}: sample {index} overflowed the measurement stack")
        if sample.status != 0:
            raise TinygenError(f"{where}: model run returned {sample.status} on sample {index}")


# ---------------------------------------------------------------------------- inspect


def section_table(elf: Path, tools: Toolchain | None = None) -> list[tuple[str, int, set[str]]]:
    """(name, size, flags) of every section, from objdump -h."""
    tools = tools or find_toolchain()
    out = subprocess.run([tools.objdump, "-h", str(elf)], capture_output=True, text=True,
                         check=True).stdout
    rows: list[tuple[str, int, set[str]]] = []
    lines = out.splitlines()
    for i, line in enumerate(lines):
        m = re.match(r"\s*\d+\s+(\S+)\s+([0-9a-fA-F]+)\s", line)
        if m and i + 1 < len(lines):
            flags = {f.strip() for f in lines[i + 1].split(",")}
            rows.append((m.group(1), int(m.group(2), 16), flags))
    return rows


def footprint(elf: Path, tools: Toolchain | None = None) -> tuple[int, int]:
    """(flash, ram) bytes of an image, the harness's stack and mailbox left out.

    flash = every loaded section (code, constants, vectors and the .data image);
    ram = writable allocated sections (.data, .bss)."""
    flash = ram = 0
    for name, size, flags in section_table(elf, tools):
        if "ALLOC" not in flags or name in HARNESS_SECTIONS:
            continue
        if "LOAD" in flags:
            flash += size
        if "READONLY" not in flags:
            ram += size
    return flash, ram


def symbol_sizes(elf_or_obj: Path, tools: Toolchain | None = None) -> dict[str, int]:
    """Defined symbols and their sizes (0 where nm gives none), from nm -S."""
    tools = tools or find_toolchain()
    out = subprocess.run([tools.nm, "-S", "--defined-only", str(elf_or_obj)],
                         capture_output=True, text=True, check=True).stdout
    sizes: dict[str, int] = {}
    for line in out.splitlines():
        parts = line.split()
        if len(parts) == 4:
            sizes[parts[3]] = int(parts[1], 16)
        elif len(parts) == 3:
            sizes.setdefault(parts[2], 0)
    return sizes


HEAP_SYMBOLS = frozenset({
    "malloc", "free", "calloc", "realloc", "memalign", "aligned_alloc", "posix_memalign",
    "_malloc_r", "_free_r", "_calloc_r", "_realloc_r", "_memalign_r", "sbrk", "_sbrk",
    "_sbrk_r",
})
# Run-time float support: the Arm EABI helpers (__aeabi_f*, __aeabi_d*, int<->float
# conversions), libgcc's soft-float names (__addsf3, __fixdfsi, __floatsisf, ...) and the
# usual libm entry points.
FLOAT_SYMBOL_RE = re.compile(
    r"^__aeabi_(?:[fd]\w*|u?l?i?2[fdh]|[fd]2\w+|c[fd]r?cmp\w*|h2f\w*)$"
    r"|^__\w+[sd]f[0-9]?$"
    r"|^__fix(?:uns)?[sd]f[sdt]i$"
    r"|^__ieee754_\w+$"
    r"|^(?:sqrt|exp|exp2|log|log2|log10|pow|round|lround|lrint|rint|nearbyint|floor|ceil"
    r"|trunc|fabs|fmod|frexp|ldexp|modf|tanh|sinh|cosh|sin|cos|tan|atan|atan2|erf)f?$")


def forbidden_symbols(elf: Path, *, allow_float: bool, tools: Toolchain | None = None,
                      board: Board | None = None) -> list[str]:
    """Symbols a bare-metal model image must not define: the heap always, float support
    unless float requantization was asked for, and in fixed builds for `board` the
    library's 64-bit multiply where the core has no long multiply. Empty list when clean."""
    names = symbol_sizes(elf, tools)
    bad = [n for n in names if n in HEAP_SYMBOLS]
    if not allow_float:
        bad += [n for n in names if FLOAT_SYMBOL_RE.match(n)]
        if board is not None and board.long_multiply_helpers:
            bad += long_multiply_calls(elf, board.long_multiply_helpers, tools)
    return sorted(set(bad))


def _calls(elf: Path, tools: Toolchain | None) -> list[tuple[str, str]]:
    """(calling function, called symbol) of every direct call (bl/jal) in the image."""
    tools = tools or find_toolchain()
    out = subprocess.run([tools.objdump, "-d", "--no-show-raw-insn", str(elf)],
                         capture_output=True, text=True, check=True).stdout
    calls, function = [], "?"
    for line in out.splitlines():
        head = re.match(r"^[0-9a-f]+ <(.+)>:$", line)
        if head:
            function = head.group(1)
            continue
        call = re.match(r"^\s+[0-9a-f]+:\s+(?:bl|blx|jal|call|tail)\s+.*<([^>+]+)>", line)
        if call:
            calls.append((function, call.group(1)))
    return calls


def long_multiply_calls(elf: Path, helpers: frozenset[str],
                        tools: Toolchain | None = None) -> list[str]:
    """'helper (from function)' for each call of a 64-bit multiply helper from the image's
    own code. The C library's 64-bit division helper multiplies internally (libgcc's
    __gnu_ldivmod_helper calls __aeabi_lmul); calls between library helpers ("__" names)
    are its business, not the model's."""
    return [f"{callee} (from {caller})" for caller, callee in _calls(elf, tools)
            if callee in helpers and not caller.startswith("__")]


# FPU data-processing instructions (moves, loads and stores of FP registers are left
# out: gcc may use s-registers as spill space in pure integer code). Arm VFP names, then
# the RISC-V F/D extension's (the rv32imc/imac cores have none; a listing is a wrong build).
FP_ARITHMETIC_RE = re.compile(
    r"^v(?:add|sub|mul|nmul|div|fma|fms|fnma|fnms|mla|mls|nmla|nmls|sqrt|abs|neg|cvt\w*"
    r"|cmp\w*|rint\w*|sel\w*|maxnm|minnm)(?:\.|$)"
    r"|^f(?:add|sub|mul|div|sqrt|min|max|madd|msub|nmadd|nmsub|cvt|eq|lt|le|class"
    r"|sgnj\w*)\.")


def float_instructions(elf: Path, tools: Toolchain | None = None) -> list[str]:
    """'function: mnemonic' for each FPU arithmetic instruction in the image's code."""
    tools = tools or find_toolchain()
    out = subprocess.run([tools.objdump, "-d", "--no-show-raw-insn", str(elf)],
                         capture_output=True, text=True, check=True).stdout
    found: list[str] = []
    function = "?"
    for line in out.splitlines():
        head = re.match(r"^[0-9a-f]+ <(.+)>:$", line)
        if head:
            function = head.group(1)
            continue
        insn = re.match(r"^\s+[0-9a-f]+:\s+(\S+)", line)
        if insn and FP_ARITHMETIC_RE.match(insn.group(1)):
            found.append(f"{function}: {insn.group(1)}")
    return found
