"""Small C programs around emitted trees, built like a user's firmware would build them: on
the host with the strict warning set, and on an emulated Cortex-M with the harness start-up
code. A program prints lines on stdout (host) or the semihosting console (target).

The expected values always come from the numpy reference (tinygen.runner) run on the same
quantized inputs, so a program's printout is compared with an independent computation.
"""
from __future__ import annotations

import subprocess
from pathlib import Path

import numpy as np

from tinygen.check import c_inputs, random_inputs
from tinygen.compiler import Compiled, storage_inputs
from tinygen.harness import target
from tinygen.harness.cbuild import STRICT_FLAGS, host_compiler
from tinygen.runner import run_reference

# print_text() for both worlds: stdout on the host, semihosting on the board.
PRINT_C = """
#include <stdint.h>
void print_text(const char *text);
void print_hex(const void *data, uint32_t count);
void print_int(int32_t value);
#if defined(__arm__)
#include "tg_fw_semihost.h"
void print_text(const char *text) { tg_fw_write0(text); }
#else
#include <stdio.h>
void print_text(const char *text) { fputs(text, stdout); }
#endif

void print_hex(const void *data, uint32_t count)
{
    static const char digits[] = "0123456789abcdef";
    const uint8_t *p = (const uint8_t *)data;
    char pair[3];
    uint32_t i;
    pair[2] = '\\0';
    for (i = 0u; i < count; ++i) {
        pair[0] = digits[p[i] >> 4];
        pair[1] = digits[p[i] & 15u];
        print_text(pair);
    }
}

void print_int(int32_t value)
{
    char text[16];
    int pos = 15;
    uint32_t magnitude = value < 0 ? 0u - (uint32_t)value : (uint32_t)value;
    text[pos] = '\\0';
    do {
        text[--pos] = (char)('0' + magnitude % 10u);
        magnitude /= 10u;
    } while (magnitude != 0u && pos > 1);
    if (value < 0) {
        text[--pos] = '-';
    }
    print_text(&text[pos]);
}
"""


def c_bytes(name: str, data: bytes) -> str:
    """A static const uint8_t array holding `data`."""
    body = ", ".join(f"0x{b:02x}" for b in data) or "0"
    return f"static const uint8_t {name}[{max(len(data), 1)}] = {{{body}}};\n"


def c_floats(name: str, rows: list[np.ndarray]) -> str:
    """static const float name[len(rows)][n], exact (C99 hexadecimal floating constants)."""
    n = rows[0].size
    lines = [", ".join(f"{float(v).hex()}f" for v in np.asarray(r, np.float32).reshape(-1))
             for r in rows]
    body = ",\n".join(f"    {{{line}}}" for line in lines)
    return f"static const float {name}[{len(rows)}][{n}] = {{\n{body}\n}};\n"


def reference_io(c: Compiled, samples) -> tuple[list[list[bytes]], list[list[bytes]]]:
    """(C input bytes, expected C output bytes) per sample, for float samples in ONNX
    layout: the inputs quantized as the model's boundary QuantizeLinear does, the outputs
    from the numpy reference."""
    g = c.graph
    ins, outs = [], []
    for floats in samples:
        st = storage_inputs(g, floats)
        ref = run_reference(g, st, c.plan.order)
        ins.append([np.ascontiguousarray(x).tobytes() for x in c_inputs(g, st)])
        expected = []
        for io, r in zip(g.outputs, ref, strict=True):
            r = r.reshape(-1)
            if io.buffer_dtype == "uint8":
                r = (r.astype(np.int16) + 128).astype(np.uint8)
            expected.append(np.ascontiguousarray(r).tobytes())
        outs.append(expected)
    return ins, outs


def samples_for(c: Compiled, n: int, seed: int) -> list[list[np.ndarray]]:
    return random_inputs(c.graph, n, seed=seed)


def storage_order(c: Compiled, x: np.ndarray, index: int = 0) -> np.ndarray:
    """An ONNX-layout input as the C takes it: storage order, flat."""
    from tinygen.ir import storage_perm
    t = c.graph.tensors[c.graph.inputs[index].name]
    return np.transpose(np.asarray(x).reshape(t.shape), storage_perm(len(t.shape), t.layout)
                        ).reshape(-1)


def reference_argmax(c: Compiled, samples) -> list[int]:
    """First index of the largest element of output 0, per sample (numpy reference)."""
    g = c.graph
    res = []
    for floats in samples:
        ref = run_reference(g, storage_inputs(g, floats), c.plan.order)
        res.append(int(np.argmax(ref[0].reshape(-1))))  # int8 domain: same order as uint8
    return res


def run_host(sources: list[Path], includes: list[Path], work: Path, defines=()) -> str:
    """Build an executable from `sources` with the strict warning set and run it."""
    work.mkdir(parents=True, exist_ok=True)
    exe = work / "prog"
    cmd = [host_compiler(), "-O2", *STRICT_FLAGS, *(f"-I{d}" for d in includes),
           *(f"-D{d}" for d in defines), *map(str, sources), "-lm", "-o", str(exe)]
    build = subprocess.run(cmd, capture_output=True, text=True)
    assert build.returncode == 0 and not build.stderr.strip(), build.stderr
    ran = subprocess.run([str(exe)], capture_output=True, text=True, timeout=120)
    assert ran.returncode == 0, ran.stderr
    return ran.stdout


def run_target(sources: list[Path], includes: list[Path], work: Path, cpu: str,
               defines=()) -> str:
    """Build the same program for `cpu` on the harness start-up code; run it under QEMU."""
    board = target.board_for(cpu)
    fw = target.FIRMWARE_DIR
    flags = [*target.firmware_defines(board), f"-I{fw}", *(f"-I{d}" for d in includes),
             *(f"-D{d}" for d in defines)]
    objs = []
    for i, src in enumerate([fw / "tg_fw_startup.c", fw / "tg_fw_semihost.c", *sources]):
        objs.append(target.compile_c(Path(src), work / f"{i}_{Path(src).stem}.o", board,
                                     opt="-O2", flags=flags))
    elf = target.link(objs, work / "prog.elf", board, opt="-O2")
    result = target.run_elf(elf, board, timeout=60)
    assert result.status == 0, (result.status, result.stdout[-500:], result.stderr[-500:])
    return result.stdout
