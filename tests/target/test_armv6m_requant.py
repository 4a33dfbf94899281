"""Requantization without a long multiply (tg_wide.h, Armv6-M): the split 32x32->64 products
and every fixed form against exact Python integers, on the host with the split forced
(-DTG_WIDE_SPLIT=1) and on a Cortex-M0 build, whose image must not call the library's
64-bit multiply. The expected values are the docs/numerics.md contract evaluated with
Python's unbounded integers, not the C or numpy code under test."""
from __future__ import annotations

import numpy as np
import pytest

from tests.runtime_c.kernel_lib import (
    RUNTIME_INCLUDE,
    CortexM,
    _build_dir,
    build_cortex_m,
    c_array,
    c_requant,
    cortex_m_tools_available,
    disassembly,
    run_qemu,
)
from tests.runtime_c.test_requant import WRAPPER_C, WRAPPER_CDEF, requant_cases
from tinygen.harness import cbuild

INT32_MIN, INT32_MAX = -(1 << 31), (1 << 31) - 1

PRODUCTS_C = """
#include "tg_requant.h"
void tg_test_products(const int32_t *a, const int32_t *b, int32_t n, int64_t *wide,
                      int32_t *hi)
{
    int32_t i;
    for (i = 0; i < n; ++i) {
        wide[i] = tg_mul32_wide(a[i], b[i]);
        hi[i] = tg_mul_hi32(a[i], b[i]);
    }
}
void tg_test_mul_shift(const int64_t *x, const int32_t *mult, const int32_t *shift, int32_t n,
                       int64_t *y)
{
    int32_t i;
    for (i = 0; i < n; ++i) {
        y[i] = tg_mul_shift(x[i], mult[i], shift[i]);
    }
}
"""
PRODUCTS_CDEF = """
void tg_test_products(const int32_t *a, const int32_t *b, int32_t n, int64_t *wide,
                      int32_t *hi);
void tg_test_mul_shift(const int64_t *x, const int32_t *mult, const int32_t *shift, int32_t n,
                       int64_t *y);
"""

# Armv6-M code, run on the AN385 (its Cortex-M3 executes Armv6-M code unchanged; the
# assembler, told -mcpu=cortex-m0, refuses anything outside Armv6-M).
CORTEX_M0 = CortexM("mps2-an385", ("-mcpu=cortex-m0", "-mthumb", "-mfloat-abi=soft"))

EDGES = [INT32_MIN, INT32_MIN + 1, -(1 << 30), -65537, -65536, -65535, -32769, -32768, -1, 0,
         1, 32767, 32768, 65535, 65536, 65537, 1 << 30, (1 << 31) - 2, INT32_MAX]


def product_cases(count: int = 4000) -> tuple[np.ndarray, np.ndarray]:
    """Every pair of edge values, then random pairs over the whole int32 range and around
    the 16-bit half boundaries."""
    rng = np.random.default_rng(6)
    a = [x for x in EDGES for _ in EDGES]
    b = [y for _ in EDGES for y in EDGES]
    a += rng.integers(INT32_MIN, INT32_MAX, size=count, endpoint=True).tolist()
    b += rng.integers(INT32_MIN, INT32_MAX, size=count, endpoint=True).tolist()
    halves = rng.integers(-3, 4, size=(2, count // 4)) + rng.choice([0, 1 << 16, -(1 << 16)],
                                                                      size=(2, count // 4))
    a += halves[0].tolist()
    b += halves[1].tolist()
    return np.array(a, dtype=np.int64), np.array(b, dtype=np.int64)


def mul_shift_cases() -> tuple[list[int], list[int], list[int]]:
    """(x, mult, shift): int32-extreme accumulators, every shift 1..62, multipliers at 0,
    2^30 and 2^31-1, and int64 x (as the Add rescaling passes) whose product fits in int64."""
    rng = np.random.default_rng(7)
    xs, ms, ss = [], [], []
    for shift in range(1, 63):
        for mult in (0, 1 << 30, INT32_MAX, int(rng.integers(1 << 30, 1 << 31))):
            for x in (INT32_MIN, INT32_MAX, -1, 0, 1, int(rng.integers(INT32_MIN, INT32_MAX))):
                xs.append(x)
                ms.append(mult)
                ss.append(shift)
    for _ in range(500):   # |x| < 2^32 keeps x * mult inside int64, as the callers prove
        x = int(rng.integers(-(1 << 32), 1 << 32))
        xs.append(x)
        ms.append(int(rng.integers(1 << 30, 1 << 31)))
        ss.append(int(rng.integers(1, 63)))
    return xs, ms, ss


def exact_mul_shift(x: int, mult: int, shift: int) -> int:
    """floor((x*mult + 2^(shift-1)) / 2^shift): the contract's one rounding (numerics.md)."""
    return (x * mult + (1 << (shift - 1))) >> shift


def test_split_products_and_requant_match_exact_integers_on_host():
    src = _build_dir() / "tg_test_wide.c"
    src.write_text(WRAPPER_C + PRODUCTS_C.replace('#include "tg_requant.h"\n', ""))
    lib_path = cbuild.build_shared([src], [RUNTIME_INCLUDE], _build_dir(),
                                   defines={"TG_WITH_FLOAT_REQUANT": "1", "TG_WIDE_SPLIT": "1"})
    ffi, lib = cbuild.load(WRAPPER_CDEF + PRODUCTS_CDEF, lib_path)
    from tests.runtime_c.kernel_lib import Marshal

    a, b = product_cases()
    m = Marshal(ffi)
    wide, wide_ptr = m.output(a.shape, np.int64)
    hi, hi_ptr = m.output(a.shape, np.int32)
    lib.tg_test_products(m.array(a, np.int32, "int32_t"), m.array(b, np.int32, "int32_t"),
                         a.size, ffi.cast("int64_t *", wide_ptr), ffi.cast("int32_t *", hi_ptr))
    want = [int(x) * int(y) for x, y in zip(a.tolist(), b.tolist(), strict=True)]
    assert wide.tolist() == want
    assert hi.tolist() == [p >> 32 for p in want]

    xs, ms, ss = mul_shift_cases()
    y, y_ptr = m.output((len(xs),), np.int64)
    lib.tg_test_mul_shift(m.array(xs, np.int64, "int64_t"), m.array(ms, np.int32, "int32_t"),
                          m.array(ss, np.int32, "int32_t"), len(xs), ffi.cast("int64_t *", y_ptr))
    assert y.tolist() == [exact_mul_shift(*c) for c in zip(xs, ms, ss, strict=True)]

    for rq, acc, want8 in requant_cases():
        if rq.is_float:
            continue
        one, one_ptr = m.output(acc.shape, np.int8)
        block, block_ptr = m.output(acc.shape, np.int8)
        lib.tg_test_requant(m.requant(rq), m.array(acc, np.int32, "int32_t"), acc.shape[1],
                            acc.shape[0], ffi.cast("int8_t *", one_ptr),
                            ffi.cast("int8_t *", block_ptr))
        np.testing.assert_array_equal(one, want8)
        np.testing.assert_array_equal(block, want8)


@pytest.mark.target
@pytest.mark.skipif(not cortex_m_tools_available(), reason="needs arm-none-eabi-gcc and QEMU")
def test_requant_on_cortex_m0_is_exact_without_long_multiply(tmp_path):
    defs, calls, expected = [], [], {}
    for i, (rq, acc, want) in enumerate(requant_cases()):
        if rq.is_float:
            continue
        rq_def, rq_expr = c_requant(f"r{i}", rq)
        defs.append(rq_def + c_array(f"r{i}_acc", "int32_t", acc))
        calls.append(f"tg_test_requant({rq_expr}, r{i}_acc, {acc.shape[1]}, {acc.shape[0]}, "
                     f"one, block); tg_test_dump(\"r{i}_one\", one, {acc.size}); "
                     f"tg_test_dump(\"r{i}_block\", block, {acc.size});")
        expected[f"r{i}_one"] = expected[f"r{i}_block"] = want.tobytes()
    a, b = product_cases(1500)
    defs.append(c_array("pa", "int32_t", a) + c_array("pb", "int32_t", b))
    calls.append(f"tg_test_products(pa, pb, {a.size}, wide, hi); "
                 f"tg_test_dump(\"wide\", wide, {8 * a.size}); "
                 f"tg_test_dump(\"hi\", hi, {4 * a.size});")
    products = [int(x) * int(y) for x, y in zip(a.tolist(), b.tolist(), strict=True)]
    expected["wide"] = np.array(products, dtype=np.int64).tobytes()
    expected["hi"] = np.array([p >> 32 for p in products], dtype=np.int32).tobytes()
    xs, ms, ss = mul_shift_cases()
    defs.append(c_array("sx", "int64_t", xs) + c_array("sm", "int32_t", ms)
                + c_array("ss", "int32_t", ss))
    calls.append(f"tg_test_mul_shift(sx, sm, ss, {len(xs)}, shifted); "
                 f"tg_test_dump(\"shifted\", shifted, {8 * len(xs)});")
    expected["shifted"] = np.array([exact_mul_shift(*c) for c in zip(xs, ms, ss, strict=True)],
                                   dtype=np.int64).tobytes()
    main_c = (WRAPPER_C + PRODUCTS_C.replace('#include "tg_requant.h"\n', "")
              + "void tg_test_dump(const char *tag, const void *data, int32_t bytes);\n"
              + "".join(defs)
              + "int main(void)\n{\n    static int8_t one[4096], block[4096];\n"
              f"    static int64_t wide[{a.size}], shifted[{len(xs)}];\n"
              f"    static int32_t hi[{a.size}];\n"
              "    " + "\n    ".join(calls) + "\n    return 0;\n}\n")
    elf = build_cortex_m([], main_c, CORTEX_M0, tmp_path)
    text = disassembly(elf)
    # Arm ARM: SMULL/UMULL/SMLAL do not exist in Armv6-M; __aeabi_lmul is the Arm run-time
    # ABI's 64-bit multiply helper (RTABI, from memory), __muldi3 its libgcc name.
    assert "__aeabi_lmul" not in text and "__muldi3" not in text
    assert "smull" not in text and "umull" not in text
    dumps = run_qemu(elf, CORTEX_M0, timeout=120)
    assert dumps.keys() == expected.keys()
    for tag, want in expected.items():
        assert dumps[tag] == want, tag


@pytest.mark.target
@pytest.mark.skipif(not cortex_m_tools_available(), reason="needs arm-none-eabi-gcc and QEMU")
def test_a_long_multiply_in_the_model_is_flagged_on_cortex_m0(tmp_path):
    # The same spin tree with one 64-bit product in the model's own code: on Armv6-M gcc
    # turns it into a call of the library helper, which the symbol check must name.
    import shutil
    from pathlib import Path

    from tinygen.emulate import emulate
    fixtures = Path(__file__).resolve().parent / "fixtures"
    tree = tmp_path / "tree"
    shutil.copytree(fixtures / "spin", tree)
    spin = tree / "spin.c"
    spin.write_text(spin.read_text().replace(
        "    base[1] = base[0];",
        "    {\n        volatile int64_t wide = (int64_t)(int32_t)base[0] * (int32_t)base[0];\n"
        "        base[1] = (uint32_t)(wide >> 32) + base[0];\n    }", 1))
    fig = emulate(tree, "spin", "cortex-m0", [[bytes(4)]], requant_float=False, per_op=False)
    assert any(s.startswith("__aeabi_lmul (from spin_run") for s in fig["forbidden_symbols"])
    clean = emulate(fixtures / "spin", "spin", "cortex-m0", [[bytes(4)]], requant_float=False,
                    per_op=False)
    assert clean["forbidden_symbols"] == []
