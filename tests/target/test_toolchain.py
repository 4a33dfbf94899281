"""Toolchain discovery and board table; no cross tools needed."""
from fractions import Fraction

import pytest

from tinygen.errors import TinygenError
from tinygen.harness import target
from tinygen.harness.toolchain import INSTALL_HINT, RISCV_INSTALL_HINT, find_toolchain


def test_missing_toolchain_says_how_to_install(monkeypatch, tmp_path):
    monkeypatch.setenv("PATH", str(tmp_path))
    with pytest.raises(TinygenError) as err:
        find_toolchain()
    assert "arm-none-eabi-gcc" in err.value.reason
    assert "qemu-system-arm" in err.value.reason
    assert INSTALL_HINT in err.value.reason


def test_missing_riscv_toolchain_says_how_to_install(monkeypatch, tmp_path):
    monkeypatch.setenv("PATH", str(tmp_path))
    with pytest.raises(TinygenError) as err:
        find_toolchain("riscv")
    assert "riscv64-unknown-elf-gcc" in err.value.reason
    assert "qemu-system-riscv32" in err.value.reason
    assert RISCV_INSTALL_HINT in err.value.reason


def test_cli_offers_every_board():
    from tinygen.cli import TARGET_CPUS
    assert sorted(TARGET_CPUS) == sorted(target.BOARDS)


def test_armv6m_cores_check_for_long_multiply_helpers():
    # Armv6-M has no SMULL/UMULL (Arm ARM, Armv6-M instruction set); the Armv7-M cores do.
    for cpu in ("cortex-m0", "cortex-m0plus"):
        assert "__aeabi_lmul" in target.BOARDS[cpu].long_multiply_helpers
        assert target.BOARDS[cpu].ram_bytes == 16 * 1024
        assert target.larger_board(target.BOARDS[cpu]).machine == "mps2-an385"
    assert not target.BOARDS["cortex-m4"].long_multiply_helpers
    assert target.larger_board(target.BOARDS["cortex-m4"]) is None


def test_unknown_cpu_lists_the_known_ones():
    with pytest.raises(TinygenError) as err:
        target.board_for("cortex-m85")
    assert "cortex-m4" in err.value.reason


def test_each_timer_tick_is_under_half_an_instruction():
    # The exactness argument of tg_fw_elapsed(): a reading is off by less than one tick,
    # so a tick must be shorter than half of the 2^shift ns one instruction takes.
    # The firmware multiplies by the period's numerator and shifts by log2 of its
    # denominator, so that denominator must be a power of two (31.25 ns = 125/4 on AN547).
    for board in target.BOARDS.values():
        assert board.tick * 2 < 2 ** target.ICOUNT_SHIFT
        assert board.tick == Fraction(board.tick_ns, 2 ** board.tick_log2_den)


def test_float_symbol_pattern():
    # Names of the Arm run-time ABI helpers and libgcc soft-float routines (from memory
    # of the RTABI and libgcc manuals) versus integer helpers and our own names.
    floats = ["__aeabi_fadd", "__aeabi_dmul", "__aeabi_f2iz", "__aeabi_i2f", "__aeabi_ul2d",
              "__aeabi_cfcmpeq", "__addsf3", "__muldf3", "__floatsisf", "__fixsfsi",
              "__fixunsdfdi", "__extendsfdf2", "__truncdfsf2", "roundf", "sqrt"]
    integers = ["__aeabi_idiv", "__aeabi_uidivmod", "__aeabi_ldivmod", "__aeabi_lmul",
                "__aeabi_llsl", "__aeabi_memcpy", "memcpy", "tg_requant", "model_run",
                "__gnu_thumb1_case_uqi", "__udivsi3", "__clzsi2"]
    assert all(target.FLOAT_SYMBOL_RE.match(n) for n in floats)
    assert not any(target.FLOAT_SYMBOL_RE.match(n) for n in integers)
