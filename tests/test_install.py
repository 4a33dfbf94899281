"""tinygen as a user gets it: a wheel built from the sources, installed into a fresh venv
outside the checkout, runs emit, check and (with the Arm toolchain) emulate on an example
copied to a folder of its own. Nothing may come from the checkout at run time.

Offline by design: the wheel is built without build isolation (the test venv's setuptools),
installed with --no-index --no-deps, and the fresh venv sees the test venv's already
installed dependencies (onnx, numpy, jinja2, cffi) through one .pth line.
"""
from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import sysconfig
import zipfile
from pathlib import Path

import pytest

# One worker builds and installs the wheel for both tests (pytest-xdist --dist loadgroup).
pytestmark = pytest.mark.xdist_group("wheel_install")
ROOT = Path(__file__).resolve().parent.parent
EXAMPLE = ROOT / "examples" / "pump_vibration"
SOURCES = ("pyproject.toml", "setup.py", "README.md", "tinygen", "runtime_c")
# What an installed tinygen reads at run time (one file of each kind).
PACKAGE_DATA = ("tinygen/runtime_c/include/tg_requant.h", "tinygen/runtime_c/src/tg_conv.c",
                "tinygen/codegen/templates/model.h.j2",
                "tinygen/harness/firmware/tg_fw_startup.c",
                "tinygen/harness/firmware/mps2_an386.ld",
                "tinygen/harness/firmware/tg_fw_rv_startup.c",
                "tinygen/harness/firmware/tg_fw_rv_virt.ld",
                "tinygen/harness/firmware/microbit.ld",
                "tinygen/runtime_c/include/tg_wide.h")


def _run(cmd, cwd, env=None, timeout=600):
    proc = subprocess.run([str(c) for c in cmd], cwd=cwd, env=env, capture_output=True,
                          text=True, timeout=timeout)
    assert proc.returncode == 0, f"{cmd}: {proc.stdout[-2000:]} {proc.stderr[-2000:]}"
    return proc


def _toolchain_present() -> bool:
    from tinygen.errors import TinygenError
    from tinygen.harness.toolchain import find_toolchain
    try:
        find_toolchain()
    except TinygenError:
        return False
    return True


@pytest.fixture(scope="module")
def installed(tmp_path_factory):
    """(tinygen script, python, clean environment) of a fresh venv holding the wheel."""
    base = tmp_path_factory.mktemp("install")
    src = base / "src"
    src.mkdir()
    for name in SOURCES:
        if (ROOT / name).is_dir():
            shutil.copytree(ROOT / name, src / name,
                            ignore=shutil.ignore_patterns("__pycache__", "*.pyc"))
        else:
            shutil.copy2(ROOT / name, src / name)
    _run([sys.executable, "-m", "pip", "wheel", "--no-deps", "--no-build-isolation",
          "--no-index", "-q", "-w", base / "dist", src], cwd=base)
    wheels = sorted((base / "dist").glob("tinygen-*.whl"))
    assert len(wheels) == 1, wheels
    with zipfile.ZipFile(wheels[0]) as whl:
        names = set(whl.namelist())
    missing = [n for n in PACKAGE_DATA if n not in names]
    assert not missing, f"the wheel lacks {missing}"

    venv = base / "venv"
    _run([sys.executable, "-m", "venv", "--without-pip", venv], cwd=base)
    python = venv / "bin" / "python"
    site = Path(_run([python, "-c", "import sysconfig; print(sysconfig.get_path('purelib'))"],
                     cwd=base).stdout.strip())
    deps = {sysconfig.get_path("purelib"), sysconfig.get_path("platlib")}
    (site / "tinygen_test_deps.pth").write_text("".join(f"{d}\n" for d in sorted(deps)))
    _run([sys.executable, "-m", "pip", "--python", python, "install", "-q", "--no-index",
          "--no-deps", wheels[0]], cwd=base)
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME")}
    env["PATH"] = f"{venv / 'bin'}{os.pathsep}{env.get('PATH', '')}"
    return venv / "bin" / "tinygen", python, env


def test_the_installed_package_reads_nothing_from_the_checkout(installed, tmp_path):
    _, python, env = installed
    out = _run([python, "-c", "import tinygen, tinygen.resources as r; print(tinygen.__file__);"
                " print(r.runtime_dir()); print(r.templates_dir()); print(r.firmware_dir())"],
               cwd=tmp_path, env=env).stdout.split()
    venv = python.parent.parent.resolve()
    for path in out:
        assert Path(path).resolve().is_relative_to(venv), (path, venv)
        assert not Path(path).resolve().is_relative_to(ROOT)


def test_emit_check_and_emulate_from_a_folder_of_its_own(installed, tmp_path):
    tinygen, _, env = installed
    work = tmp_path / "work"
    work.mkdir()
    shutil.copy2(EXAMPLE / "pump_vibration.onnx", work / "pump.onnx")
    emitted = json.loads(_run([tinygen, "emit", "pump.onnx", "-o", "tree", "--json"],
                              cwd=work, env=env).stdout)
    assert {"model.c", "model.h", "tg_requant.h", "tg_conv.c"} <= set(emitted["files"])
    assert sorted(p.name for p in (work / "tree").iterdir()) == sorted(emitted["files"])
    checked = json.loads(_run([tinygen, "check", "pump.onnx", "--samples", "5", "--json"],
                              cwd=work, env=env).stdout)
    assert checked["bit_exact"] is True and checked["samples"] == 5
    if not _toolchain_present():
        pytest.skip("emulate needs arm-none-eabi-gcc and qemu-system-arm (emit and check ran)")
    ran = json.loads(_run([tinygen, "emulate", "pump.onnx", "--cpu", "cortex-m4",
                           "--samples", "2", "--json"], cwd=work, env=env).stdout)
    assert ran["bit_exact"] is True and ran["samples"] == 2
