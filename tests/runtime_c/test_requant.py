"""Requantization forms (tg_requant.h, tinygen.reference.requant) against the contract formula
of docs/numerics.md, y = clamp(zp + floor((acc*mult + 2^(shift-1)) / 2^shift), lo, hi),
evaluated here with Python's exact integers: over every shift, the multiplier and zero-point
extremes, int32-extreme accumulators and the values next to each rounding boundary; then the
C (host, Cortex-M4 DSP path, Cortex-M3 plain path) against the same formula."""
from __future__ import annotations

import numpy as np
import pytest

from tests.runtime_c.kernel_lib import (
    CORTEX_M3,
    CORTEX_M4,
    REQUANT_CDEF,
    RUNTIME_INCLUDE,
    _build_dir,
    build_cortex_m,
    c_array,
    c_requant,
    cortex_m_tools_available,
    disassembly,
    run_qemu,
)
from tinygen.harness import cbuild
from tinygen.reference.requant import (
    FORM_EXACT,
    FORM_FAST,
    INT32_MAX,
    Requant,
    choose_form,
    fast_form,
    make_requant,
    quantize_multiplier,
    requantize,
    requantize_fast,
)


def contract(acc: int, mult: int, shift: int, zp: int, lo: int = -128, hi: int = 127) -> int:
    """docs/numerics.md, fixed mode, in exact integer arithmetic."""
    v = zp + (acc * mult + (1 << (shift - 1))) // (1 << shift)
    return min(max(v, lo), hi)


def boundary_accs(rng, mult: int, shift: int, bound: int, count: int) -> list[int]:
    """Accumulators within [-bound, bound]: the extremes, zero, and those on both sides of
    the points where the rounded quotient steps (acc*mult + 2^(shift-1) = k * 2^shift)."""
    accs = {bound, -bound, 0, 1, -1}
    if mult:
        for q in rng.integers(-200, 200, size=count):
            exact = (int(q) * (1 << shift) - (1 << (shift - 1))) / mult
            for a in (int(np.floor(exact)) + d for d in (-1, 0, 1, 2)):
                if -bound <= a <= bound:
                    accs.add(a)
    accs.update(int(a) for a in rng.integers(-bound, bound + 1, size=count, dtype=np.int64))
    return sorted(accs)


MULTS = (1 << 30, (1 << 31) - 1, 1518500250, 1 << 30 | 1)


@pytest.mark.parametrize("shift", range(1, 63))
def test_fast_form_equals_contract_for_every_shift(shift):
    rng = np.random.default_rng(shift)
    mults = [*MULTS, *(int(m) for m in rng.integers(1 << 30, 1 << 31, size=4))]
    for bound in (INT32_MAX, 1 << 24, 5000):
        for zp in (-128, 127, 0, int(rng.integers(-128, 128))):
            form = fast_form(np.array(mults), np.full(len(mults), shift), zp, bound)
            if form is None:
                # refused only where a pre-shift cannot fit the bound or sums could wrap
                assert shift <= 32 or shift >= 54
                continue
            chan, pre = form
            for c, m in enumerate(mults):
                accs = boundary_accs(rng, m, shift, bound, 60)
                got = requantize_fast(np.array(accs), chan[c:c + 1].repeat(len(accs), 0), pre)
                want = [contract(a, m, shift, zp) for a in accs]
                assert got.tolist() == want, (shift, m, zp, bound)


def test_fast_form_covers_the_usual_layers():
    """Conv/fc multipliers (s_x s_w / s_y ~ 2^-4 .. 2^-20) take the fast form at the int32
    worst case; small shifts take it with a pre-shift once the bound leaves room."""
    for real in (2.0**-4, 0.0123, 3.1e-5, 2.0**-20):
        rq = make_requant([real], 5, -128, 127, "fixed")
        assert rq.form == FORM_FAST and rq.pre == 0
    small = make_requant([0.3], -7, -128, 127, "fixed")  # shift 32
    assert small.form == FORM_EXACT
    assert choose_form(small, 1 << 20).form == FORM_FAST and small.pre == 1


def test_requantize_runs_the_chosen_form():
    rng = np.random.default_rng(7)
    real = 2.0 ** rng.uniform(-30, -1.2, size=16)
    acc = rng.integers(-(1 << 20), 1 << 20, size=(50, 16))
    for bound in (INT32_MAX, 1 << 20):
        rq = make_requant(real, -3, -100, 90, "fixed", acc_bound=bound)
        want = [[contract(int(a), int(m), int(s), -3, -100, 90)
                 for a, m, s in zip(row, rq.mult, rq.shift, strict=True)] for row in acc]
        assert requantize(acc, rq).tolist() == want


# --- the C: tg_requant and tg_requant_pixel over every form -----------------------------------

WRAPPER_C = """
#include "tg_requant.h"
void tg_test_requant(const tg_requant_t *rq, const int32_t *acc, int32_t channels,
                     int32_t rows, int8_t *one, int8_t *block)
{
    int32_t r, c;
    for (r = 0; r < rows; ++r) {
        for (c = 0; c < channels; ++c) {
            one[r * channels + c] = tg_requant(acc[r * channels + c], rq, c);
        }
        tg_requant_pixel(rq, acc + r * channels, 0, channels, block + r * channels);
    }
}
"""
WRAPPER_CDEF = REQUANT_CDEF + """
void tg_test_requant(const tg_requant_t *rq, const int32_t *acc, int32_t channels,
                     int32_t rows, int8_t *one, int8_t *block);
"""


def requant_cases():
    """(Requant, accumulators [rows][channels], expected) in every form and clamp."""
    rng = np.random.default_rng(11)
    cases = []
    for i in range(12):
        channels = int(rng.integers(1, 9))
        lo, hi = [(-128, 127), (-128, 127), (-20, 127), (-128, 40), (3, 5)][i % 5]
        zp = int(rng.choice([-128, 127, int(rng.integers(-128, 128))]))
        real = 2.0 ** rng.uniform(-40 if i % 3 else -3, -0.2, size=channels)
        bound = int(rng.choice([INT32_MAX, 1 << 22, 3000]))
        rq = make_requant(real, zp, lo, hi, "fixed", acc_bound=bound)
        acc = rng.integers(-bound, bound + 1, size=(40, channels), dtype=np.int64)
        acc[0], acc[1] = bound, -bound
        want = np.array([[contract(int(a), int(m), int(s), zp, lo, hi)
                          for a, m, s in zip(row, rq.mult, rq.shift, strict=True)]
                         for row in acc], dtype=np.int8)
        cases.append((rq, acc.astype(np.int32), want))
    forms = {rq.form for rq, _, _ in cases}
    assert forms == {FORM_FAST, FORM_EXACT} and any(rq.pre for rq, _, _ in cases)
    for i in range(4):  # float mode: ties, values past the clamp and past 2^24
        channels = 5
        scale = np.array([0.5, 0.25, 1.5, 3.0e-4, 40.0], dtype=np.float32)
        rq = make_requant(scale, int(rng.integers(-128, 128)), *[(-128, 127), (-9, 60)][i % 2],
                          "float")
        acc = rng.integers(-(1 << 31), 1 << 31, size=(40, channels), dtype=np.int64)
        acc[:20] = rng.integers(-600, 600, size=(20, channels))
        cases.append((rq, acc.astype(np.int32), requantize(acc, rq)))
    return cases


def test_c_requant_matches_contract_on_host():
    src = _build_dir() / "tg_test_requant.c"
    src.write_text(WRAPPER_C)
    lib_path = cbuild.build_shared([src], [RUNTIME_INCLUDE], _build_dir(),
                                   defines={"TG_WITH_FLOAT_REQUANT": "1"})
    ffi, lib = cbuild.load(WRAPPER_CDEF, lib_path)
    from tests.runtime_c.kernel_lib import Marshal
    for rq, acc, want in requant_cases():
        m = Marshal(ffi)
        one, one_ptr = m.output(acc.shape, np.int8)
        block, block_ptr = m.output(acc.shape, np.int8)
        lib.tg_test_requant(m.requant(rq), m.array(acc, np.int32, "int32_t"), acc.shape[1],
                            acc.shape[0], ffi.cast("int8_t *", one_ptr),
                            ffi.cast("int8_t *", block_ptr))
        np.testing.assert_array_equal(one, want)
        np.testing.assert_array_equal(block, want)


@pytest.mark.target
@pytest.mark.skipif(not cortex_m_tools_available(), reason="needs arm-none-eabi-gcc and QEMU")
@pytest.mark.parametrize("core", [CORTEX_M4, CORTEX_M3], ids=["cortex-m4-dsp", "cortex-m3"])
def test_c_requant_matches_contract_on_cortex_m(core, tmp_path):
    defs, calls, expected = [], [], {}
    for i, (rq, acc, want) in enumerate(requant_cases()):
        if rq.is_float and core is CORTEX_M3:
            continue  # no FPU: fixed mode only
        rq_def, rq_expr = c_requant(f"r{i}", rq)
        defs.append(rq_def + c_array(f"r{i}_acc", "int32_t", acc))
        n = acc.size
        calls.append(f"tg_test_requant({rq_expr}, r{i}_acc, {acc.shape[1]}, {acc.shape[0]}, "
                     f"one, block); tg_test_dump(\"r{i}_one\", one, {n}); "
                     f"tg_test_dump(\"r{i}_block\", block, {n});")
        expected[f"r{i}_one"] = expected[f"r{i}_block"] = want.tobytes()
    main_c = (WRAPPER_C + "void tg_test_dump(const char *tag, const void *data, int32_t bytes);\n"
              + "".join(defs) + "int main(void)\n{\n    static int8_t one[4096], block[4096];\n"
              "    " + "\n    ".join(calls) + "\n    return 0;\n}\n")
    elf = build_cortex_m([], main_c, core, tmp_path)
    text = disassembly(elf)
    assert ("smmla" in text) == (core is CORTEX_M4)  # the M4 build takes the DSP sequence
    if core is CORTEX_M4:
        assert "vcvtr.s32.f32" in text
    dumps = run_qemu(elf, core)
    assert dumps.keys() == expected.keys()
    for tag, want in expected.items():
        assert dumps[tag] == want, tag


def test_quantize_multiplier_range():
    """Q31 mantissa in [2^30, 2^31), shift 1..62 (docs/numerics.md)."""
    assert quantize_multiplier(1e-30) == (0, 1)  # too small to move any int32
    for real in (2.0**-30, 0.1, 0.5, 0.9999):
        m, s = quantize_multiplier(real)
        assert (1 << 30) <= m < (1 << 31) and 1 <= s <= 62
    assert Requant(None, None, np.ones(1, np.float32), 0).is_float
