"""Build runtime_c kernels into a host shared library once per session and marshal arguments.

    ffi, lib = kernel_lib(["tg_conv.c"], REQUANT_CDEF + CONV_CDEF)

Sources are names under runtime_c/src; the library is compiled with the strict warning set
and TG_WITH_FLOAT_REQUANT=1, so both requant modes are reachable (rq->scale selects float).
The Cortex-M helpers below build the same sources for a QEMU board and read results back
over semihosting.
"""
from __future__ import annotations

import atexit
import functools
import os
import shutil
import subprocess
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from tinygen.harness import cbuild
from tinygen.reference.requant import Requant

ROOT = Path(__file__).resolve().parents[2]
RUNTIME_SRC = ROOT / "runtime_c" / "src"
RUNTIME_INCLUDE = ROOT / "runtime_c" / "include"
HOST_DEFINES = {"TG_WITH_FLOAT_REQUANT": "1"}

# tg_requant.h, field for field.
REQUANT_CDEF = """
typedef struct {
    const int32_t *chan;
    const float *scale;
    int32_t form;
    int32_t pre;
    int32_t out_zp;
    int32_t act_min;
    int32_t act_max;
} tg_requant_t;
"""


@functools.lru_cache(maxsize=1)
def _build_dir() -> Path:
    path = cbuild.scratch_dir("tinygen-kernels-")
    atexit.register(shutil.rmtree, path, True)
    return path


@functools.cache
def _load(sources: tuple[str, ...], cdef: str):
    # TG_KERNEL_SANITIZE=1 builds with ASan/UBSan (run python with libasan in LD_PRELOAD).
    sanitize = cbuild.SANITIZE_FLAGS if os.environ.get("TG_KERNEL_SANITIZE") == "1" else []
    lib_path = cbuild.build_shared([RUNTIME_SRC / s for s in sources], [RUNTIME_INCLUDE],
                                   _build_dir(), defines=HOST_DEFINES, extra_flags=sanitize)
    return cbuild.load(cdef, lib_path)


def kernel_lib(sources: list[str], cdef: str):
    """(ffi, lib) for runtime_c/src `sources` declared by `cdef`; built once per session."""
    return _load(tuple(sources), cdef)


def pick_zero_point(rng) -> int:
    """An int8-domain zero point: the extremes -128 / 127 half of the time, else any."""
    return int(rng.choice([-128, 127, int(rng.integers(-128, 128))]))


def to_int8_domain(q: np.ndarray, zp) -> tuple[np.ndarray, np.ndarray]:
    """uint8 data with zero point z equals int8 data q - 128 with zero point z - 128."""
    if q.dtype == np.uint8:
        return ((q.astype(np.int16) - 128).astype(np.int8),
                np.asarray(zp, dtype=np.int32) - 128)
    return q, np.asarray(zp, dtype=np.int32)


class Marshal:
    """Turns numpy arrays and Requant into cffi pointers, keeping every buffer alive."""

    def __init__(self, ffi):
        self.ffi = ffi
        self._keep: list[object] = []

    def array(self, values, dtype, ctype: str):
        """Pointer to a C-contiguous copy of `values` as `dtype`, typed `ctype *`."""
        arr = np.ascontiguousarray(values, dtype=dtype)
        self._keep.append(arr)
        return self.ffi.cast(f"{ctype} *", self.ffi.from_buffer(arr))

    def optional_array(self, values, dtype, ctype: str):
        return self.ffi.NULL if values is None else self.array(values, dtype, ctype)

    def output(self, shape, dtype) -> tuple[np.ndarray, object]:
        """A zero-filled result array and a void pointer to it."""
        out = np.zeros(shape, dtype=dtype)
        self._keep.append(out)
        return out, self.ffi.cast("void *", self.ffi.from_buffer(out))

    def scratch(self, nbytes: int):
        """A scratch pointer that is 4-byte aligned but not 8 (the least the plan promises)."""
        buf = np.zeros(nbytes // 8 + 2, dtype=np.int64)
        self._keep.append(buf)
        return self.ffi.cast("char *", self.ffi.from_buffer(buf)) + 4

    def requant(self, rq: Requant | None):
        """tg_requant_t * for rq (NULL for None), in the form rq says (float: chan NULL)."""
        if rq is None:
            return self.ffi.NULL
        c = self.ffi.new("tg_requant_t *")
        self._keep.append(c)
        c.chan = self.optional_array(rq.chan, np.int32, "int32_t")
        c.scale = self.optional_array(rq.scale, np.float32, "float")
        c.form, c.pre = rq.form, rq.pre
        c.out_zp, c.act_min, c.act_max = rq.out_zp, rq.act_min, rq.act_max
        return c

    def struct(self, ctype: str, **fields):
        """A new `ctype` struct with the given fields set."""
        c = self.ffi.new(f"{ctype} *")
        self._keep.append(c)
        for name, value in fields.items():
            setattr(c, name, value)
        return c


# --- Cortex-M builds run under QEMU (semihosting prints the results) -----------------------

ARM_CC = "arm-none-eabi-gcc"
ARM_OBJDUMP = "arm-none-eabi-objdump"
QEMU_ARM = "qemu-system-arm"


@dataclass(frozen=True)
class CortexM:
    """A QEMU board and the compiler flags of its core."""

    machine: str
    cpu_flags: tuple[str, ...]


# mps2-an386 is a Cortex-M4 with FPU (DSP extension), mps2-an385 a Cortex-M3 (no DSP), per
# `qemu-system-arm -M help`. Both map SSRAM at 0x00000000 and 0x20000000 (from memory of
# QEMU's mps2 board model; the linker script below uses 4 MB and 1 MB of them).
CORTEX_M4 = CortexM("mps2-an386", ("-mcpu=cortex-m4", "-mthumb", "-mfloat-abi=hard",
                                    "-mfpu=fpv4-sp-d16"))
CORTEX_M3 = CortexM("mps2-an385", ("-mcpu=cortex-m3", "-mthumb", "-mfloat-abi=soft"))

_LINKER_SCRIPT = """
MEMORY {
    CODE (rx) : ORIGIN = 0x00000000, LENGTH = 4M
    RAM (rwx) : ORIGIN = 0x20000000, LENGTH = 1M
}
ENTRY(tg_test_reset)
SECTIONS {
    .text : {
        LONG(ORIGIN(RAM) + LENGTH(RAM))
        KEEP(*(.vectors))
        *(.text*) *(.rodata*)
        . = ALIGN(4);
    } > CODE
    _data_load = LOADADDR(.data);
    .data : { _data_start = .; *(.data*) . = ALIGN(4); _data_end = .; } > RAM AT > CODE
    .bss (NOLOAD) : { _bss_start = .; *(.bss*) *(COMMON) . = ALIGN(4); _bss_end = .; } > RAM
}
"""

# Reset handler, fault vectors and semihosting output for the test programs.
_STARTUP_C = r"""
#include <stdint.h>
#include <string.h>

extern uint32_t _data_load, _data_start, _data_end, _bss_start, _bss_end;
int main(void);

static int tg_test_semihost(int op, const void *arg)
{
    register int r0 __asm__("r0") = op;
    register const void *r1 __asm__("r1") = arg;
    __asm__ volatile("bkpt 0xab" : "+r"(r0) : "r"(r1) : "memory");
    return r0;
}

void tg_test_print(const char *s)
{
    (void)tg_test_semihost(0x04, s); /* SYS_WRITE0 (Arm semihosting, from memory) */
}

static void tg_test_exit(void)
{
    /* SYS_EXIT with ADP_Stopped_ApplicationExit (Arm semihosting, from memory) */
    (void)tg_test_semihost(0x18, (const void *)0x20026);
    for (;;) {
    }
}

void tg_test_fault(void)
{
    tg_test_print("FAULT\n");
    tg_test_exit();
}

void tg_test_reset(void)
{
    memcpy(&_data_start, &_data_load, (size_t)((char *)&_data_end - (char *)&_data_start));
    memset(&_bss_start, 0, (size_t)((char *)&_bss_end - (char *)&_bss_start));
#if defined(__ARM_FP)
    /* CPACR: full access to CP10/CP11, the FPU (Armv7-M system control space, from memory) */
    *(volatile uint32_t *)0xE000ED88u |= 0xFu << 20;
    __asm__ volatile("dsb\n\tisb" ::: "memory");
#endif
    (void)main();
    tg_test_exit();
}

typedef void (*tg_test_vector_t)(void);
__attribute__((section(".vectors"), used)) const tg_test_vector_t tg_test_vectors[] = {
    tg_test_reset, tg_test_fault, tg_test_fault, tg_test_fault, tg_test_fault, tg_test_fault,
};
"""

# Prints an int8/int32 buffer as hex bytes, one line per call: "<tag> <hex>".
_PRINT_C = r"""
void tg_test_print(const char *s);

void tg_test_dump(const char *tag, const void *data, int32_t bytes)
{
    static const char digits[] = "0123456789abcdef";
    const uint8_t *p = (const uint8_t *)data;
    char line[129];
    int32_t i;
    int32_t n = 0;
    tg_test_print(tag);
    tg_test_print(" ");
    for (i = 0; i < bytes; ++i) {
        line[n++] = digits[p[i] >> 4];
        line[n++] = digits[p[i] & 15];
        if (n == 128 || i == bytes - 1) {
            line[n] = '\0';
            tg_test_print(line);
            n = 0;
        }
    }
    tg_test_print("\n");
}
"""


def cortex_m_tools_available() -> bool:
    return all(shutil.which(t) for t in (ARM_CC, ARM_OBJDUMP, QEMU_ARM))


def build_cortex_m(sources: list[str], main_c: str, core: CortexM, out_dir: Path) -> Path:
    """Link runtime_c/src `sources` with a generated test main into an ELF for `core`.

    The runtime and the test program both compile with the strict warning set.
    """
    out_dir.mkdir(parents=True, exist_ok=True)
    (out_dir / "link.ld").write_text(_LINKER_SCRIPT)
    (out_dir / "startup.c").write_text(_STARTUP_C)
    (out_dir / "main.c").write_text("#include <stdint.h>\n" + _PRINT_C + main_c)
    elf = out_dir / "test.elf"
    cmd = [ARM_CC, *core.cpu_flags, "-O2", *cbuild.STRICT_FLAGS, "-ffunction-sections",
           f"-I{RUNTIME_INCLUDE}", *[f"-D{k}={v}" for k, v in HOST_DEFINES.items()],
           *[str(RUNTIME_SRC / s) for s in sources], str(out_dir / "startup.c"),
           str(out_dir / "main.c"), "-nostartfiles", "--specs=nano.specs",
           f"-T{out_dir / 'link.ld'}", "-Wl,--gc-sections", "-o", str(elf), "-lc", "-lgcc"]
    proc = subprocess.run(cmd, capture_output=True, text=True)
    if proc.returncode != 0:
        raise AssertionError(f"Cortex-M build failed:\n{proc.stderr}")
    return elf


def disassembly(elf: Path) -> str:
    return subprocess.run([ARM_OBJDUMP, "-d", str(elf)], capture_output=True, text=True,
                          check=True).stdout


def run_qemu(elf: Path, core: CortexM, timeout: float = 60.0) -> dict[str, bytes]:
    """Run an ELF on the core's QEMU board; returns {tag: bytes} from tg_test_dump lines."""
    console = elf.with_suffix(".out")
    cmd = [QEMU_ARM, "-M", core.machine, "-nographic", "-monitor", "none", "-serial", "none",
           "-chardev", f"file,id=semihost,path={console}",
           "-semihosting-config", "enable=on,target=native,chardev=semihost",
           "-kernel", str(elf)]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout,
                          stdin=subprocess.DEVNULL)
    text = console.read_text() if console.exists() else ""
    if "FAULT" in text or proc.returncode != 0:
        raise AssertionError(f"QEMU run failed ({proc.returncode}): {text[:500]}{proc.stderr}")
    dumps = {}
    for line in text.splitlines():
        tag, _, hex_bytes = line.partition(" ")
        dumps[tag] = bytes.fromhex(hex_bytes)
    return dumps


def c_array(name: str, ctype: str, values) -> str:
    """`static const ctype name[] = {...};`; floats as exact hex literals."""
    flat = np.asarray(values).reshape(-1)
    if ctype == "float":
        items = [f"{float(v).hex()}f" for v in flat.astype(np.float32)]
    else:
        items = [str(int(v)) for v in flat]
    return f"static const {ctype} {name}[] = {{{', '.join(items or ['0'])}}};\n"


def c_optional_array(name: str, ctype: str, values) -> tuple[str, str]:
    """(definition, expression): the array and its name, or nothing and NULL for None."""
    if values is None:
        return "", "NULL"
    return c_array(name, ctype, values), name


def c_requant(name: str, rq: Requant | None) -> tuple[str, str]:
    """(definitions, expression) of a `const tg_requant_t *` for rq (NULL for None)."""
    if rq is None:
        return "", "NULL"
    chan, chan_expr = c_optional_array(f"{name}_chan", "int32_t", rq.chan)
    scale, scale_expr = c_optional_array(f"{name}_scale", "float", rq.scale)
    struct = (f"static const tg_requant_t {name} = {{{chan_expr}, {scale_expr}, {rq.form}, "
              f"{rq.pre}, {rq.out_zp}, {rq.act_min}, {rq.act_max}}};\n")
    return chan + scale + struct, f"&{name}"
